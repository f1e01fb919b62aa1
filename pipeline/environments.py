"""Training environments of a split: how many a run sees, the source-rotation groups, and the plan-time
check that refuses a penalised run that would be ERM in disguise.

Reads split plan items / split records (dicts from pipeline.splits: `sources`, `source_stations`,
`environments`, `target_train_fraction`, and `environment_fallback_from` when the split fell back to a
finer unit) and job slices (pipeline.config.job_slice: `penalty`, `selection`); writes nothing. Config
keys obeyed through those: split.environment, split.environment_fallback, penalty.name, penalty.weight,
penalty.extra.warmup_weight, selection.rule, selection.also. Pure Python, no torch: it runs while the DAG
is planned.

Why: every invariance penalty compares environments. With one training environment V-REx's variance is 0,
Group DRO's single weight is 1, and IRMv1 reduces to a gradient-norm regulariser of pooled ERM; the run
is labelled penalised but learns nothing about invariance. The same holds for each refit of the
source-rotation rule, which trains without one source group. Such runs are refused before any job runs.
"""

from __future__ import annotations

import json

from pipeline.errors import InputError
from pipeline.names import ERM
from pipeline.selection import ROTATION



def admitted_environments(split: dict) -> int:
    """1 when part of the target's train block is admitted into training (its own environment), else 0."""
    return 1 if float(split.get("target_train_fraction") or 0.0) > 0 else 0


def training_environment_count(split: dict) -> int:
    """Environments the training windows of a split fall into: source environments plus the admitted one."""
    return len(split["environments"]) + admitted_environments(split)


def rotation_groups(split: dict, station_city: dict[str, str]) -> dict[str, set[str]]:
    """Groups the source-rotation rule leaves out one at a time: the source cities, or the source
    environments when there is a single source city (within-city splits)."""
    if len(split["sources"]) >= 2:
        return {city: {s for s in split["source_stations"] if station_city.get(s) == city}
                for city in split["sources"]}
    return {env: set(stations) for env, stations in split["environments"].items()}


def refit_environment_counts(split: dict, station_city: dict[str, str]) -> dict[str, int]:
    """Training environments of each source-rotation refit (left-out group -> count)."""
    counts = {}
    for group, left_out in rotation_groups(split, station_city).items():
        kept = [env for env, stations in split["environments"].items() if set(stations) - left_out]
        counts[group] = len(kept) + admitted_environments(split)
    return counts


def is_penalised(penalty: dict | None) -> bool:
    """Same rule as pipeline.penalties.Penalty.penalised, on a config slice (no torch needed)."""
    if not penalty or penalty.get("name") == ERM:
        return False
    warmup_weight = float((penalty.get("extra") or {}).get("warmup_weight", 0.0))
    return max(float(penalty.get("weight", 0.0)), warmup_weight) > 0


def describe(split: dict) -> str:
    """The environment unit as shown in tags and in the grid, naming a fallback when there was one."""
    unit = split.get("environment", "?")
    requested = split.get("environment_fallback_from")
    return f"{unit} (fallback from {requested})" if requested else str(unit)


def check_environments(split: dict, job: dict, station_city: dict[str, str]) -> None:
    """One-line InputError when a penalised run of this split, or one of its source-rotation refits,
    would train on fewer than two environments. ERM runs and non-trained families pass."""
    penalty = job.get("penalty")
    if not is_penalised(penalty):
        return
    name, split_id = penalty["name"], split.get("split_id", "?")
    hint = "set split.environment_fallback=station (or cluster), or leave this split out"
    count = training_environment_count(split)
    if count < 2:
        raise InputError(f"{split_id}: penalty {name} needs >= 2 training environments, the split has {count} "
                         f"({split.get('environment')} unit: {', '.join(split['environments'])}); {hint}",
                         field="split.environment")
    selection = job.get("selection") or {}
    if ROTATION in [selection.get("rule"), *(selection.get("also") or [])]:
        short = {group: n for group, n in refit_environment_counts(split, station_city).items() if n < 2}
        if short:
            group = sorted(short)[0]
            raise InputError(f"{split_id}: penalty {name} with {ROTATION}: the refit without {group} "
                             f"trains on {short[group]} environment; drop {ROTATION} from selection "
                             f"or use more source groups", field="selection")


def check_units(splits: dict[str, dict], units: list[dict], station_city: dict[str, str]) -> None:
    """check_environments for every split x unit of a planned training job list (units carry "job")."""
    seen = set()
    for unit in units:
        job = unit["job"]
        key = json.dumps([job.get("penalty"), job.get("selection")], sort_keys=True, default=str)
        if key in seen:  # seeds of one penalty share the answer
            continue
        seen.add(key)
        for split in splits.values():
            check_environments(split, job, station_city)
