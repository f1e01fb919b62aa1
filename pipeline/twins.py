"""ERM twins: a penalised run and the ERM run it is compared with must get the same training protocol.

Reads job slices (pipeline.config.job_slice: `penalty`, `fit`); writes nothing. Config keys obeyed
through them: penalty.name, penalty.warmup_steps, penalty.extra.reset_optimizer, fit.sampling,
fit.validation_windows, fit.max_steps. Pure Python, no torch: it runs while the DAG is planned.

The grid reads a penalty's effect as the difference to the ERM run of the same split, model and seed.
That difference is the penalty's only if nothing else differs. Today's protocol has three things that
depend on the schedule, not on the weight (pipeline.penalties, pipeline.train_loop): the optimizer is
rebuilt when the warm-up ends, checkpoints are selected only after it, and early stopping counts only
evaluations after it. An ERM run given the same `penalty.warmup_steps` gets all three; one with another
warm-up does not, and is not a twin. Batch composition (`fit.sampling`) must match as well; the grid
also keys twins on it (pipeline.grid_stats).
"""

from __future__ import annotations

from pipeline.errors import InputError
from pipeline.fit_config import validation_windows_of
from pipeline.names import ERM

DEFAULT_SAMPLING = "balanced"  # what runs logged before fit.sampling existed used


def treatment(job: dict) -> dict:
    """What a run's training protocol is, apart from the objective itself."""
    penalty = job.get("penalty") or {}
    warmup = int(penalty.get("warmup_steps", 0))
    reset = bool((penalty.get("extra") or {}).get("reset_optimizer", True))
    fit = job.get("fit") or {}
    return {"warmup_steps": warmup, "optimizer_reset_at": warmup if reset and warmup > 0 else None,
            "sampling": fit.get("sampling", DEFAULT_SAMPLING),
            "validation_windows": validation_windows_of(fit)}


# The config key behind each part of the treatment, named in the refusal.
FIELD_OF = {"warmup_steps": "penalty.warmup_steps", "optimizer_reset_at": "penalty.extra.reset_optimizer",
            "sampling": "fit.sampling", "validation_windows": "fit.validation_windows"}


def check_schedule(job: dict) -> None:
    """A warm-up that lasts the whole fit leaves no checkpoint to select (selection starts after it)."""
    penalty, fit = job.get("penalty") or {}, job.get("fit") or {}
    warmup, max_steps = int(penalty.get("warmup_steps", 0)), int(fit.get("max_steps", 1))
    if warmup >= max_steps:
        raise InputError(f"{warmup} leaves no step after the warm-up to select from (fit.max_steps "
                         f"{max_steps})", field="penalty.warmup_steps")


def check_units(units: list[dict]) -> None:
    """One-line InputError when a penalised unit's protocol differs from its ERM twin's (same model)."""
    for unit in units:
        if unit["job"].get("penalty") is not None:
            check_schedule(unit["job"])
    twins = [u for u in units if u.get("penalty") == ERM]
    if not twins:
        return  # no ERM run in the sweep: nothing is compared
    # A searched ERM (pipeline.search) may try several schedules; a penalised trial needs one of them.
    treatments = [treatment(twin["job"]) for twin in twins]
    for unit in units:
        if unit.get("penalty") in (ERM, None) or unit["job"].get("penalty") is None:
            continue
        found = treatment(unit["job"])
        if found in treatments:
            continue
        expected = treatments[0]
        for key, value in found.items():
            if value != expected[key]:
                raise InputError(f"{unit['penalty']} has {key} {value} but its ERM twin {expected[key]}: the twin "
                                 f"must get the same treatment; give every penalty of the sweep the same "
                                 f"{FIELD_OF[key]}", field=FIELD_OF[key])
