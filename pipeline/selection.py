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
Every rule also names its validation value at the chosen step (`score`); a hyperparameter search
(pipeline.search) selects its trial by that value under the same rule (`choose_trial`).
Every rule chooses among the steps that have a stored snapshot: the training loop stores none during a
penalty's warm-up (pipeline.train_loop), so no rule can report a warm-up model, which is the ERM twin's.
"""

from __future__ import annotations

HOLDOUT = "source-holdout"
ROTATION = "source-rotation"
PEEK = "target-peek"
RULES = (HOLDOUT, ROTATION, PEEK)  # the one list of rule names (config check, grid, report, CLI)
UPPER_BOUND_LABEL = "target-peek (upper bound: selected with target data)"
SCORE = "selection_score"  # metric `<rule>.selection_score`: the rule's validation value at its chosen step


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


def _rule_curve(rule: str, history: list[dict], rotation_curves: dict[str, dict[int, float]] | None) -> dict:
    """The validation curve a rule minimises: source validation risk, the averaged rotation curve, or the
    target validation risk (target-peek only)."""
    if rule == HOLDOUT:
        return curve(history, "val/source/all")
    if rule == PEEK:
        return curve(history, "val/target/all")
    if rule == ROTATION:
        if not rotation_curves:
            raise ValueError("source-rotation needs the curves of the left-out refits")
        common = set.intersection(*(set(points) for points in rotation_curves.values()))
        return {s: sum(points[s] for points in rotation_curves.values()) / len(rotation_curves) for s in common}
    raise ValueError(f"unknown selection rule {rule!r}")


def choose_step(rule: str, history: list[dict], available_steps: list[int],
                rotation_curves: dict[str, dict[int, float]] | None = None) -> int:
    if not history:
        return available_steps[0] if available_steps else 0
    step = _argmin_step(_stored(_rule_curve(rule, history, rotation_curves), available_steps))
    return nearest_step(step, available_steps)


def score(rule: str, history: list[dict], step: int,
          rotation_curves: dict[str, dict[int, float]] | None = None) -> float:
    """The rule's validation value at the chosen step (NaN when it has none, e.g. source-rotation with a
    single source group): what the rule compares across the trials of a hyperparameter search."""
    if rule == ROTATION and not rotation_curves:
        return float("nan")
    return float(_rule_curve(rule, history, rotation_curves).get(step, float("nan")))


def choose_trial(rule: str, trial_metrics: list) -> int:
    """Index of the search trial a rule selects: the lowest `<rule>.selection_score` (earliest trial on a tie;
    the first when none is finite). Reads that one metric of each trial and nothing else, so an honest rule
    never sees target data."""
    return _argmin_step({index: float(metrics.get(f"{rule}.{SCORE}", float("nan")))
                         for index, metrics in enumerate(trial_metrics)})
