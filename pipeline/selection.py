"""Model-selection rules: which evaluated checkpoint of a fit a run reports.

Reads a fitted model's `history_` (one entry per evaluation with `val/<set>/all` risks) and, for
source-rotation, the validation curves of refits that each left one source group out. Obeys
`selection.rule` and `selection.also`.

- source-holdout: lowest risk on the validation time block of the source environments (honest default).
- source-rotation: refit without each source group, score on the left-out group's validation
  block, average the curves over groups, take the step with the lowest average (honest; costs refits).
- target-peek: lowest risk on the target's validation block. It uses target data, so it is only an
  upper bound and every figure built from it is labelled as such.
Ties go to the earliest step (fewer updates). Families without a training curve have one step, 0.
Every rule chooses among the steps that have a stored snapshot: the training loop stores none during a
penalty's warm-up (pipeline.train_loop), so no rule can report a warm-up model, which is the ERM twin's.
"""

from __future__ import annotations

HOLDOUT = "source-holdout"
ROTATION = "source-rotation"
PEEK = "target-peek"
RULES = (HOLDOUT, ROTATION, PEEK)  # the one list of rule names (config check, grid, report, CLI)
UPPER_BOUND_LABEL = "target-peek (upper bound: selected with target data)"


def uses_target_data(rule: str) -> bool:
    return rule == PEEK


def label(rule: str) -> str:
    """How a selection rule is named in every table and figure."""
    return UPPER_BOUND_LABEL if uses_target_data(rule) else rule


def _argmin_step(points: dict[int, float]) -> int:
    finite = {step: value for step, value in points.items() if value == value}  # drop NaN
    if not finite:
        return min(points) if points else 0
    best = min(finite.values())
    return min(step for step, value in finite.items() if value == best)


def _stored(points: dict[int, float], available_steps: list[int]) -> dict[int, float]:
    """The points whose step has a snapshot (all points when none has: the nearest snapshot is used)."""
    stored = set(available_steps)
    kept = {step: value for step, value in points.items() if step in stored}
    return kept or points


def curve(history: list[dict], key: str) -> dict[int, float]:
    return {int(entry["step"]): float(entry[key]) for entry in history if key in entry}


def nearest_step(step: int, available: list[int]) -> int:
    """The stored snapshot closest to `step` (earlier one on a tie)."""
    return min(available, key=lambda s: (abs(s - step), s))


def choose_step(rule: str, history: list[dict], available_steps: list[int],
                rotation_curves: dict[str, dict[int, float]] | None = None) -> int:
    if not history:
        return available_steps[0] if available_steps else 0
    if rule == HOLDOUT:
        step = _argmin_step(_stored(curve(history, "val/source/all"), available_steps))
    elif rule == PEEK:
        step = _argmin_step(_stored(curve(history, "val/target/all"), available_steps))
    elif rule == ROTATION:
        if not rotation_curves:
            raise ValueError("source-rotation needs the curves of the left-out refits")
        common = set.intersection(*(set(points) for points in rotation_curves.values()))
        averaged = {s: sum(points[s] for points in rotation_curves.values()) / len(rotation_curves)
                    for s in common}
        step = _argmin_step(_stored(averaged, available_steps))
    else:
        raise ValueError(f"unknown selection rule {rule!r}")
    return nearest_step(step, available_steps)
