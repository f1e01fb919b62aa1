"""A hand-made grid for the aggregation, report and grid-command tests: a temporary MLflow store with a
handful of runs whose metrics are chosen so ranks, means and tallies have known answers.

Three leave-one-city-out splits over invented cities (vell, orra, quist), model `lin` with erm and irm
(seeds 0 and 1) and the `persistence` baseline (penalty na, seed 0): 15 runs. Each lin+irm run is the
parent of a two-trial hyperparameter search (penalty weights 100 and 10; see SEARCHED).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

SPLITS = {  # split_id -> (sources, target)
    "loco-orra+quist-to-vell-aaaaaa": (["orra", "quist"], "vell"),
    "loco-quist+vell-to-orra-bbbbbb": (["quist", "vell"], "orra"),
    "loco-orra+vell-to-quist-cccccc": (["orra", "vell"], "quist"),
}
SPLIT_IDS = list(SPLITS)
# source-holdout target_mae per split x (model, penalty) -> per seed; target-peek is 0.1 lower everywhere
TARGET_MAE = {
    SPLIT_IDS[0]: {("lin", "erm"): [1.0, 1.2], ("lin", "irm"): [0.9, 1.1], ("persistence", "na"): [1.5]},
    SPLIT_IDS[1]: {("lin", "erm"): [2.0, 2.0], ("lin", "irm"): [2.2, 2.4], ("persistence", "na"): [1.8]},
    SPLIT_IDS[2]: {("lin", "erm"): [1.0, 1.0], ("lin", "irm"): [0.5, 0.7], ("persistence", "na"): [3.0]},
}
HORIZON = 3
PARAMS = {"metrics.hourly_exceedance_threshold": "35.0", "forecast.target": "pm25", "forecast.stride_hours": "1",
          "forecast.horizon_hours": str(HORIZON)}
NAIVE_SCALE = {"s1": 2.0, "s2": 4.0}  # per-station MASE scales written into the predictions artifact
RULES = ("source-holdout", "target-peek")
CITIES = ("orra", "quist", "vell")


def metrics_for(mae: float) -> dict[str, float]:
    metrics = {}
    for rule, shift in (("source-holdout", 0.0), ("target-peek", -0.1)):
        value = mae + shift
        metrics.update({f"{rule}.target_mae": value, f"{rule}.target_rmse": value * 1.3,
                        f"{rule}.target_csi": 1.0 / (1.0 + value), f"{rule}.target_pod": 0.8 / (1.0 + value),
                        f"{rule}.target_far": value / 10, f"{rule}.target_ets": 0.5 / (1.0 + value),
                        f"{rule}.source_mae": value / 2})
        metrics.update({f"{rule}.target_mae_h{h:02d}": value * (0.8 + 0.1 * h) for h in range(1, HORIZON + 1)})
    metrics.update({key.split(".", 1)[1]: v for key, v in metrics.items() if key.startswith("source-holdout.")})
    metrics["fit_seconds"] = 1.0
    return metrics


def predictions(mae: float, seed: int) -> pd.DataFrame:
    """Windows of 2 stations x 40 hourly origins whose absolute error averages about `mae`."""
    rng = np.random.default_rng(seed + int(mae * 1000))
    origins = pd.date_range("2024-03-01", periods=40, freq="h", tz="UTC")
    frames = []
    for rule, shift in (("source-holdout", 0.0), ("target-peek", -0.1)):
        for station in ("s1", "s2"):
            frame = pd.DataFrame({"station_id": station, "origin": origins, "selection": rule,
                                  "naive_scale": NAIVE_SCALE[station]})
            for h in range(1, HORIZON + 1):
                y = rng.normal(20, 5, len(origins))
                frame[f"y_h{h:02d}"] = y.astype("float32")
                error = (mae + shift) * rng.choice([-1.0, 1.0], len(origins)) * rng.uniform(0.5, 1.5, len(origins))
                frame[f"p_h{h:02d}"] = (y + error).astype("float32")
            frames.append(frame)
    return pd.concat(frames, ignore_index=True)


# lin+irm runs are search parents of two trials: penalty weight 100 (selected by both rules; the parent's
# metrics) and weight 10 (every target error SEARCH_GAP higher, and a higher selection score)
SEARCHED = ("lin", "irm")
WEIGHTS = (100.0, 10.0)
SEARCH_GAP = 0.3


def search_trials(client, experiment_id: str, tags: dict, mae: float, params: dict = PARAMS) -> list[dict]:
    """Log the two trials of one searched run; returns their entries of the run record's "search"."""
    from pipeline import tracking

    trials = []
    for index, weight in enumerate(WEIGHTS):
        metrics = metrics_for(mae + SEARCH_GAP * index)
        metrics.update({f"{rule}.selection_score": 1.0 + index for rule in RULES})
        values = {"penalty.weight": weight}
        run_id = tracking.log_run(client, experiment_id, run_name="trial", params=params, metrics=metrics, curves={},
                                  tags={**tags, tracking.ROLE_TAG: "trial", tracking.TRIAL_TAG: json.dumps(values)},
                                  artifacts={})
        trials.append({"trial": index, "run_id": run_id, "values": values, "reused": False})
    return trials


# Several forecast targets (`targets=` of build_grid_store): the k-th variable's errors are (k + 1) times
# the first's, so its ranks match and its means have known answers.
def build_grid_store(root: Path, targets: tuple[str, ...] = ("pm25",)) -> tuple[list[Path], str]:
    """Log every run to a fresh SQLite store under `root` and write the run records; returns (records, uri).

    With several `targets`, every run is logged once per forecast variable, its record under runs/<variable>/.
    """
    from pipeline import tracking

    results = root / "results"
    results.mkdir(parents=True, exist_ok=True)
    uri = tracking.resolve_tracking_uri(None, results)
    experiment_id = tracking.setup_store(uri, "gridtest", tracking.artifact_location(results))
    client = tracking.client_for(uri)
    records = []
    cells_of = [(variable, scale, split_id, cells) for scale, variable in enumerate(targets, start=1)
                for split_id, cells in TARGET_MAE.items()]
    for variable, scale, split_id, cells in cells_of:
        sources, target = SPLITS[split_id]
        params = {**PARAMS, "forecast.target": variable}
        folder = Path(variable) if len(targets) > 1 else Path()
        for (model, penalty), values in cells.items():
            for seed, mae in enumerate(values):
                mae = mae * scale
                work = root / "work" / folder / split_id / model / penalty / str(seed)
                work.mkdir(parents=True)
                predictions(mae, seed).to_parquet(work / "target_predictions.parquet", index=False)
                metrics = metrics_for(mae)
                tags = {"split_id": split_id, "model": model, "penalty": penalty, "seed": str(seed),
                        "sources": "+".join(sources), "target": target, "code_digest": "c0ffee",
                        "git.commit": "0123456789abcdef", "selection_label": "source-holdout"}
                if len(targets) > 1:
                    tags["forecast_target"] = variable
                trials = search_trials(client, experiment_id, tags, mae, params) if (model, penalty) == SEARCHED else []
                if trials:
                    tags = {**tags, tracking.ROLE_TAG: "parent", "search.budget": str(len(trials))}
                run_id = tracking.log_run(client, experiment_id, run_name=f"{split_id}/{model}/{penalty}/{seed}",
                                          params=params, metrics=metrics,
                                          curves={}, tags=tags,
                                          artifacts={"predictions": work / "target_predictions.parquet"})
                record = {"run_id": run_id, "experiment": "gridtest", "experiment_id": experiment_id,
                          "tracking_uri": uri, "split_id": split_id, "sources": sources, "target": target,
                          "model": model, "family": "linear" if model == "lin" else "persistence",
                          "penalty": penalty, "seed": seed, "selection_rule": "source-holdout",
                          "metrics": {k: metrics[k] for k in ("target_mae", "target_csi", "source_mae")},
                          "supersedes": []}
                if trials:
                    for trial in trials:
                        client.set_tag(trial["run_id"], tracking.PARENT_TAG, run_id)
                    record["search"] = {"budget": len(trials), "trials": trials, "selected": {rule: 0 for rule in RULES}}
                path = results / "runs" / folder / split_id / model / penalty / f"{seed}.json"
                path.parent.mkdir(parents=True, exist_ok=True)
                path.write_text(json.dumps(record))
                records.append(path)
    return records, uri


def write_side_inputs(root: Path) -> tuple[list[Path], list[Path]]:
    """QC reports and split records as ingestion and build_split would write them (only what the report reads)."""
    qc_paths, split_paths = [], []
    for city in CITIES:
        path = root / "data" / "qc" / f"{city}.json"
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps({"rows": {"read": 1000, "kept": 990, "dropped": 10,
                                             "dropped_by_reason": {"exact_duplicate": 10}},
                                    "gaps": {f"{city}_01": {}, f"{city}_02": {}}}))
        qc_paths.append(path)
    for split_id, (sources, target) in SPLITS.items():
        path = root / "results" / "splits" / f"{split_id}.json"
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps({"split_id": split_id, "scheme": "loco", "sources": sources, "target": target,
                                    "environment": "city", "time_blocks": {"train": ["2024-01-01", "2024-02-01"],
                                                                           "test": ["2024-03-01", "2024-03-03"]}}))
        split_paths.append(path)
    return qc_paths, split_paths


def shift_table() -> pd.DataFrame:
    return pd.DataFrame({"city_a": ["orra", "orra", "quist"], "city_b": ["quist", "vell", "vell"],
                         "energy_distance": [0.2, 0.5, 0.9], "mean_wasserstein": [0.1, 0.3, 0.4],
                         "geo_km": [30.0, 55.0, 70.0], "n_rows_a": [100, 100, 100], "n_rows_b": [100, 100, 100],
                         "variables": ["pm25,temp_c"] * 3})


def build_report(root: Path, report_cfg: dict, n_boot: int, ground_truth: dict | None = None,
                 targets: tuple[str, ...] = ("pm25",)) -> tuple[str, Path]:
    """The whole fixture (store, grid, QC, splits, shift) rendered to root/results/report.html."""
    from pipeline.aggregate import aggregate
    from pipeline.report.html import render_report

    records, _ = build_grid_store(root, targets)
    aggregate(records, root / "results", metric="mae", n_boot=n_boot)
    qc_paths, split_paths = write_side_inputs(root)
    shift_table().to_csv(root / "results" / "shift.csv", index=False)
    out = root / "results" / "report.html"
    page = render_report(root / "results", out, report_cfg, qc_paths, split_paths, root / "results" / "shift.csv",
                         ground_truth=ground_truth)
    return page, out
