"""Fitting and evaluating one run: a model of one config slice and seed on one split's windows.

Pure computation (no files, no MLflow): pipeline.train_job reads the inputs, calls `run_seed` for every
unit of a job and logs the outcome. Obeys the job slice (pipeline.config.job_slice): model, penalty,
fit (with `fit.validation_windows`: which validation windows every fit is evaluated and selected on, see
`validation_sets`), selection (rule + also: every rule's checkpoint is evaluated), forecast, metrics.
Metrics are computed in the target's canonical units on the target test block, plus the source test
block per environment (worst-environment risk, in-distribution vs target gap); per rule also its validation
value at the chosen step (`<rule>.selection_score`), by which a hyperparameter search selects its trial.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np
import pandas as pd

from pipeline import selection
from pipeline.environments import rotation_groups
from pipeline.fit_config import FitConfig, validation_windows_of
from pipeline.metrics import forecast_scores, mse
from pipeline.models import build_model
from pipeline.penalties import build_penalty
from pipeline.windows import non_overlapping_targets


def subset(window_set, mask: np.ndarray):
    """The windows of a WindowSet where mask is True (same feature and environment lists)."""
    return dataclasses.replace(window_set, X=window_set.X[mask], y=window_set.y[mask], env=window_set.env[mask],
                               station=window_set.station[mask], origin=window_set.origin[mask])


def validation_sets(windows, job: dict) -> dict:
    """The validation sets every fit of this job is evaluated and selected on (all families, search trials,
    selection rules and rotation refits): {"source": ..., "target": ...}, each thinned as
    `fit.validation_windows` says (pipeline.fit_config). Test metrics never use these: they take every
    test window."""
    sets = {"source": windows.val_source, "target": windows.val_target}
    if validation_windows_of(job["fit"]) == "all":
        return sets
    horizon = job["forecast"]["horizon_hours"]
    return {name: subset(window_set, non_overlapping_targets(window_set, horizon))
            for name, window_set in sets.items()}


def station_city_map(tables: dict[str, pd.DataFrame]) -> dict[str, str]:
    return {station: city for city, table in tables.items() for station in table["station_id"].unique()}


def _make_penalty(job: dict):
    spec = job["penalty"]
    if spec is None:
        return None
    return build_penalty(spec["name"], weight=spec["weight"], warmup_steps=spec["warmup_steps"],
                         **spec.get("extra", {}))


def _model(job: dict, seed: int):
    params = {k: v for k, v in job["model"].items() if k != "family"}
    return build_model(job["model"]["family"], params, seed=seed)


def _fit(job: dict, seed: int, train, val: dict):
    return _model(job, seed).fit(train, val=val, penalty=_make_penalty(job), fit_config=FitConfig(**job["fit"]))


class SeedGroup:
    """The seeds of one job slice whose main fits train together (pipeline.ensemble), on the first seed's
    turn; each later seed takes its model, bit-identical to the one its own fit would give."""

    def __init__(self, job: dict, seeds: list[int]):
        self.job, self.seeds, self.models = job, list(seeds), None

    @staticmethod
    def worthwhile(job: dict, seeds: list[int], train) -> bool:
        """True when the family trains seeds together (linear, mlp; see TorchForecaster.fit_together)."""
        model = _model(job, seeds[0])
        return len(seeds) > 1 and getattr(model, "trains_together", lambda _: False)(train)

    def fit(self, seed: int, train, val: dict):
        if self.models is None:
            models = [_model(self.job, s) for s in self.seeds]
            fitted = type(models[0]).fit_together(models, train, val, _make_penalty(self.job),
                                                  FitConfig(**self.job["fit"]))
            self.models = dict(zip(self.seeds, fitted))
        return self.models.pop(seed)


def validation_history(model, val: dict) -> list[dict]:
    """The fit's evaluations; a closed-form fit, which has none, gets its one evaluation at step 0 with the
    training loop's risk (MSE on the scaled windows, `val/<set>/all`), so every family's search trials are
    compared by the same validation score."""
    if model.history_:
        return model.history_
    entry = {"step": 0}
    for name, windows in val.items():
        if len(windows.y):
            entry[f"val/{name}/all"] = float(np.mean((model.predict(windows.X) - windows.y) ** 2))
    return [entry]


def rotation_curves(job: dict, seed: int, windows, split: dict, station_city: dict,
                    val_source) -> dict[str, dict]:
    """Per left-out source group, the validation curve of a refit without it, on `val_source` (the job's
    source validation set, pipeline.train.validation_sets) restricted to the group's stations."""
    curves = {}
    for group, stations in rotation_groups(split, station_city).items():
        keep = ~np.isin(windows.train.station, list(stations))
        held = np.isin(val_source.station, list(stations))
        if keep.sum() == 0 or held.sum() == 0:
            continue
        held_out = {"source": subset(val_source, held)}
        refit = _fit(job, seed, subset(windows.train, keep), held_out)
        curves[group] = selection.curve(validation_history(refit, held_out), "val/source/all")
    return curves


def _evaluate(model, windows, job: dict) -> tuple[dict, np.ndarray]:
    """Target and source test metrics in canonical units for the model's current snapshot."""
    threshold = job["metrics"]["hourly_exceedance_threshold"]
    y_target = windows.unscale_target(windows.test_target.y)
    p_target = windows.unscale_target(model.predict(windows.test_target.X))
    scores = {f"target_{k}": v for k, v in
              forecast_scores(y_target, p_target, windows.test_target.station, windows.target_naive_scales,
                              threshold).items()}
    source = windows.test_source
    y_source = windows.unscale_target(source.y)
    p_source = windows.unscale_target(model.predict(source.X))
    scores["source_mae"] = float(np.nanmean(np.abs(y_source - p_source))) if len(source.y) else float("nan")
    scores["source_mse"] = mse(y_source, p_source) if len(source.y) else float("nan")
    env_risks = {}
    for index, name in enumerate(source.env_names):
        mask = source.env == index
        if mask.any():
            env_risks[name] = mse(y_source[mask], p_source[mask])
    for name, risk in env_risks.items():
        scores[f"source_env_mse.{name}"] = risk
    scores["worst_source_env_mse"] = max(env_risks.values()) if env_risks else float("nan")
    scores["gap_mae"] = scores["target_mae"] - scores["source_mae"]
    return scores, p_target


def predictions_frame(windows, predictions: dict[str, np.ndarray]) -> pd.DataFrame:
    """The target test windows of every rule: observed y_hXX and forecast p_hXX per window, plus the
    station's MASE scale, so the aggregation can recompute every error statistic per forecast origin
    (block bootstrap intervals, Diebold-Mariano) from this one artifact."""
    test = windows.test_target
    y = windows.unscale_target(test.y)
    scale = np.array([windows.target_naive_scales.get(s, np.nan) for s in test.station], dtype=np.float64)
    frames = []
    for rule, pred in predictions.items():
        frame = pd.DataFrame({"station_id": test.station, "origin": test.origin, "selection": rule,
                              "naive_scale": scale})
        for step in range(y.shape[1]):
            frame[f"y_h{step + 1:02d}"] = y[:, step].astype("float32")
            frame[f"p_h{step + 1:02d}"] = pred[:, step].astype("float32")
        frames.append(frame)
    return pd.concat(frames, ignore_index=True)


def history_curves(history: list[dict]) -> dict[str, list[tuple[int, float]]]:
    keys = {"train_loss": "curve.train_loss", "val/source/all": "curve.val_source",
            "val/target/all": "curve.val_target"}
    return {name: [(e["step"], e[key]) for e in history if key in e and np.isfinite(e[key])]
            for key, name in keys.items()}


def state_for_saving(model) -> dict:
    import torch

    state = model.state_dict() or {}
    return {k: torch.as_tensor(np.asarray(v)) if not isinstance(v, torch.Tensor) else v
            for k, v in state.items()}


def run_seed(job: dict, seed: int, windows, split: dict, station_city: dict, group: SeedGroup | None = None) -> dict:
    """Fit one seed (through its `group` when it trains with its siblings) and evaluate it under every
    configured selection rule."""
    started = time.perf_counter()
    val = validation_sets(windows, job)
    model = group.fit(seed, windows.train, val) if group is not None else _fit(job, seed, windows.train, val)
    fit_seconds = time.perf_counter() - started
    primary = job["selection"]["rule"]
    rules = list(dict.fromkeys([primary, *job["selection"]["also"]]))
    history = validation_history(model, val)
    rotation = None
    if selection.ROTATION in rules:
        rotation = rotation_curves(job, seed, windows, split, station_city, val["source"])
        if not rotation and model.history_:
            rules.remove(selection.ROTATION)  # a single source group cannot be left out
    metrics, predictions, chosen = {}, {}, {}
    for rule in rules:
        step = selection.choose_step(rule, model.history_, model.snapshot_steps_, rotation)
        model.use_snapshot(step)
        scores, predictions[rule] = _evaluate(model, windows, job)
        chosen[rule] = step
        metrics.update({f"{rule}.{k}": v for k, v in scores.items()})
        metrics[f"{rule}.selected_step"] = step
        # what a hyperparameter search compares across trials under this rule (pipeline.selection.choose_trial)
        metrics[f"{rule}.{selection.SCORE}"] = selection.score(rule, history, step, rotation)
    if primary in chosen:
        model.use_snapshot(chosen[primary])
        metrics.update({k.split(".", 1)[1]: v for k, v in metrics.items() if k.startswith(f"{primary}.")})
    metrics["fit_seconds"] = fit_seconds
    # Everything this seed computed (fits, refits, evaluation): the rest of a job's wall time is start-up
    # and bookkeeping, which bench/startup_overhead.py reports as a share of the sweep.
    metrics["compute_seconds"] = time.perf_counter() - started
    return {"model": model, "metrics": metrics, "predictions": predictions, "chosen": chosen,
            "primary": primary if primary in chosen else rules[0],
            "validation_windows": {name: len(window_set.y) for name, window_set in val.items()}}
