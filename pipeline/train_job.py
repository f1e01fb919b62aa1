"""I/O shell of a training job: read inputs, train every seed, log to MLflow, write the run records.

Called by the `train_model` rule (pipeline/scripts/train_model.py) and by `shiftgrid reproduce`.
Reads the split record and clean Parquet files named in it; writes MLflow runs and
results/runs/<split_id>/<model>/<penalty>/<seed>.json. Obeys the job slice built by
pipeline.config.job_slice plus the tracking URI/experiment handed over by the rule.
"""

from __future__ import annotations

import json
import tempfile
import time
from pathlib import Path

import pandas as pd
import yaml

from pipeline import provenance, selection, tracking
from pipeline.atomic import write_json_atomic
from pipeline.train import history_curves, predictions_frame, run_seed, state_for_saving, station_city_map
from pipeline.windows import ForecastConfig, build_windows

HEADLINE = ("target_mae", "target_rmse", "target_mse", "target_mase", "target_csi", "source_mae", "gap_mae",
            "worst_source_env_mse")


def load_inputs(split_path: Path | str, clean_paths: dict[str, str] | None = None):
    split = json.loads(Path(split_path).read_text())
    paths = clean_paths or split["inputs"]
    tables = {city: pd.read_parquet(path) for city, path in paths.items()}
    return split, tables


def tags_for(split: dict, job: dict, seed: int, code_digest: str) -> dict[str, str]:
    tags = {"split_id": split["split_id"], "scheme": split["scheme"], "sources": "+".join(split["sources"]),
            "target": split["target"], "environment": split["environment"], "model": job["model_name"],
            "family": job["model"]["family"], "penalty": job["penalty_name"], "seed": str(seed),
            "selection_rule": job["selection"]["rule"], "code_digest": code_digest,
            "package_digest": provenance.source_digest(["."])}
    tags.update({f"data_digest.{city}": digest for city, digest in split["input_digests"].items()})
    tags.update({f"git.{k}": v for k, v in provenance.git_state().items()})
    tags.update({f"version.{k}": v for k, v in provenance.package_versions().items()})
    return tags


def _artifacts(workdir: Path, job: dict, split: dict, outcome: dict, windows) -> dict[str, Path]:
    import torch

    config_file = workdir / "resolved_config.yaml"
    config_file.write_text(yaml.safe_dump({"job": job, "split": split}, sort_keys=True))
    predictions = workdir / "target_predictions.parquet"
    predictions_frame(windows, outcome["predictions"]).to_parquet(predictions, index=False)
    weights = workdir / "model_state.pt"
    torch.save(state_for_saving(outcome["model"]), weights)
    curve = workdir / "training_curve.json"
    curve.write_text(json.dumps({"history": outcome["model"].history_, "chosen_steps": outcome["chosen"],
                                 "skipped_windows": windows.skipped}, default=float, indent=1))
    return {"config": config_file, "predictions": predictions, "model": weights, "curve": curve}


def run_train_job(split_path: Path | str, job: dict, seeds: list[int], record_paths: list[Path | str],
                  tracking_uri: str, experiment: str, code_digest: str, clean_paths: dict | None = None,
                  supersede: bool = True) -> list[dict]:
    """Train every seed; returns the run records (also written to record_paths, one per seed)."""
    started = time.perf_counter()
    split, tables = load_inputs(split_path, clean_paths)
    windows = build_windows(split, tables, ForecastConfig(**job["forecast"]))
    prepare_seconds = time.perf_counter() - started  # data reading and windowing: real work, once per job
    station_city = station_city_map(tables)
    client = tracking.client_for(tracking_uri)
    experiment_id = tracking.experiment_id(client, experiment)
    params = tracking.flatten({k: v for k, v in job.items() if k != "model_name"})
    params.update({"n_train_windows": str(len(windows.train.y)), "n_test_windows": str(len(windows.test_target.y))})
    records = []
    for seed, record_path in zip(seeds, record_paths):
        outcome = run_seed(job, seed, windows, split, station_city)
        outcome["metrics"]["prepare_seconds"] = prepare_seconds
        tags = tags_for(split, job, seed, code_digest)
        tags["selection_label"] = selection.label(outcome["primary"])
        with tempfile.TemporaryDirectory() as workdir:
            artifacts = _artifacts(Path(workdir), job, split, outcome, windows)
            run_name = f"{split['split_id']}/{job['model_name']}/{job['penalty_name']}/{seed}"
            run_id = tracking.log_run(client, experiment_id, run_name=run_name, params=params,
                                      metrics=outcome["metrics"], curves=history_curves(outcome["model"].history_),
                                      tags=tags, artifacts=artifacts)
        superseded = []
        if supersede:
            identity = {k: tags[k] for k in tracking.RUN_IDENTITY_TAGS}
            superseded = tracking.supersede_previous(client, experiment_id, identity, run_id)
        record = {"run_id": run_id, "experiment": experiment, "experiment_id": experiment_id,
                  "tracking_uri": tracking_uri, "split_id": split["split_id"], "sources": split["sources"],
                  "target": split["target"], "model": job["model_name"], "family": job["model"]["family"],
                  "penalty": job["penalty_name"], "seed": seed, "selection_rule": outcome["primary"],
                  "metrics": {k: outcome["metrics"].get(k) for k in HEADLINE}, "supersedes": superseded}
        write_json_atomic(record, record_path)
        records.append(record)
    return records
