"""I/O shell of a training job: read inputs, train every seed, log to MLflow, write the run records.

Called by the `train_model` rule (pipeline/scripts/train_model.py) and by `shiftgrid verify`.
Reads the split record and clean Parquet files named in it; writes MLflow runs and
results/runs/<split_id>/<model>/<penalty>/<seed>.json (for a searched unit: its trials' child runs and their
parent run, which the record names; pipeline.search_job). Obeys the job slice built by
pipeline.config.job_slice plus the tracking URI/experiment handed over by the rule.
"""

from __future__ import annotations

import hashlib
import json
import tempfile
import time
from pathlib import Path

import pandas as pd
import yaml

from pipeline import names, provenance, run_state, selection, tracking, twins
from pipeline import search, search_job
from pipeline.config import canonical_json
from pipeline.atomic import write_json_atomic
from pipeline.train import (SeedGroup, history_curves, predictions_frame, run_seed, state_for_saving,
                            station_city_map)
from pipeline.windows import ForecastConfig, build_windows



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
            tracking.FORECAST_TARGET_TAG: job["forecast"]["target"],
            "family_code_digest": provenance.training_code_digest([job["model"]["family"]]),
            "package_digest": provenance.source_digest(["."])}
    # The protocol a run shares with its ERM twin (pipeline.twins): how its batches were drawn ("na" for
    # closed-form families, which draw none), and whether its split fell back to a finer environment unit.
    tags["sampling"] = job["fit"].get("sampling", twins.DEFAULT_SAMPLING) if job["penalty"] is not None else names.NOT_APPLICABLE
    if split.get("environment_fallback_from"):
        tags["environment_fallback_from"] = split["environment_fallback_from"]
    tags.update(search.trial_tags(job))  # a search trial: its searched values complete its identity
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


def unit_digest(job: dict, seed: int, split: dict) -> str:
    """Everything a run's result depends on: its config slice, seed, the code of its family and of the
    shared training path, and the split with its data digests. Equal digests mean a retrain would
    reproduce the logged run (same machine)."""
    basis = {"job": job, "seed": seed, "code": provenance.training_code_digest([job["model"]["family"]]),
             "split": {k: v for k, v in split.items() if k != "inputs"}}
    return hashlib.sha256(canonical_json(basis).encode()).hexdigest()[:20]


def make_record(run_id: str, experiment: str, experiment_id: str, tracking_uri: str, split: dict, job: dict,
                seed: int, primary_rule: str, metrics: dict, superseded: list[str], reused: bool) -> dict:
    return {"run_id": run_id, "experiment": experiment, "experiment_id": experiment_id,
            "tracking_uri": tracking.redact(tracking_uri), "split_id": split["split_id"], "sources": split["sources"],
            "target": split["target"], "model": job["model_name"], "family": job["model"]["family"],
            "penalty": job["penalty_name"], "seed": seed, "selection_rule": primary_rule,
            "metrics": {k: metrics.get(k) for k in tracking.HEADLINE_METRICS}, "supersedes": superseded, "reused": reused}


def _train_and_log(client, experiment_id: str, unit: dict, split: dict, windows, station_city: dict,
                   code_digest: str, digest: str, prepare_seconds: float, group: SeedGroup | None = None):
    job, seed = unit["job"], unit["seed"]
    tags = tags_for(split, job, seed, code_digest)
    tags["unit_digest"] = digest
    run_name = f"{split['split_id']}/{job['model_name']}/{job['penalty_name']}/{seed}"
    # RUNNING while it trains: a job killed now leaves a run the next job can close (pipeline.run_state)
    run_id = run_state.start_run(client, experiment_id, run_name, tags)
    with run_state.closed_on_failure(client, run_id):
        outcome = run_seed(job, seed, windows, split, station_city, group)
        outcome["metrics"]["prepare_seconds"] = prepare_seconds
        tags["selection_label"] = selection.label(outcome["primary"])
        params = tracking.flatten({k: v for k, v in job.items() if k != "model_name"})
        params.update({"n_train_windows": str(len(windows.train.y)),
                       "n_test_windows": str(len(windows.test_target.y))})
        # fit.validation_windows is among the params (the job slice); the sizes show what it left
        params.update({f"n_val_{name}_windows": str(n) for name, n in outcome["validation_windows"].items()})
        with tempfile.TemporaryDirectory() as workdir:
            artifacts = _artifacts(Path(workdir), job, split, outcome, windows)
            tracking.log_run(client, experiment_id, run_name=run_name, params=params, metrics=outcome["metrics"],
                             curves=history_curves(outcome["model"].history_),
                             tags={"selection_label": tags["selection_label"]}, artifacts=artifacts, run_id=run_id)
    return run_id, outcome["primary"], outcome["metrics"], {k: tags[k] for k in tracking.RUN_IDENTITY_TAGS}


def run_train_job(split_path: Path | str, units: list[dict], record_paths: list[Path | str],
                  tracking_uri: str, experiment: str, code_digest: str, clean_paths: dict | None = None,
                  supersede: bool = True, reuse: bool = True) -> list[dict]:
    """Produce every unit's run ({"job": config slice, "seed"}); write one run record per unit. A unit with
    "search" trains (or reuses) each of its trials and its record names their parent run (pipeline.search_job).

    With `reuse`, a unit whose digest matches a current finished run is not retrained: its record points
    at that run. This keeps re-runs minimal inside a job that Snakemake re-runs as a whole (e.g. the
    split's baselines job after one baseline's hyperparameter changed).
    """
    started = time.perf_counter()
    split, tables = load_inputs(split_path, clean_paths)
    client = tracking.client_for(tracking_uri)
    experiment_id = tracking.experiment_id(client, experiment)
    windows = station_city = prepare_seconds = None
    done, trials, groups = {}, {}, {}

    def current_run(job: dict, seed: int):
        return tracking.find_current_run(client, experiment_id, unit_digest(job, seed, split)) if reuse else None

    expanded = list(search_job.expand(units, record_paths))  # a searched unit: its trials
    for position, (index, unit, record_path) in enumerate(expanded):
        job, seed = unit["job"], unit["seed"]
        digest = unit_digest(job, seed, split)
        found = tracking.find_current_run(client, experiment_id, digest) if reuse else None
        if found is not None:
            record = make_record(found.info.run_id, experiment, experiment_id, tracking_uri, split, job, seed,
                                 found.data.tags.get("selection_rule", job["selection"]["rule"]),
                                 found.data.metrics, [], reused=True)
        else:
            run_state.close_orphans(client, experiment_id, digest)  # runs left RUNNING by a killed job
            if windows is None:  # built once, and only when something is trained
                windows = build_windows(split, tables, ForecastConfig(**job["forecast"]))
                station_city = station_city_map(tables)
                prepare_seconds = time.perf_counter() - started  # reading and windowing: real work
            slice_key = canonical_json(job)
            if slice_key not in groups:  # this seed and the later ones of the same slice that need training
                seeds = [seed] + [later["seed"] for _, later, _ in expanded[position + 1:]
                                  if canonical_json(later["job"]) == slice_key
                                  and current_run(later["job"], later["seed"]) is None]
                groups[slice_key] = SeedGroup(job, seeds) if SeedGroup.worthwhile(job, seeds, windows.train) else None
            run_id, primary, metrics, identity = _train_and_log(
                client, experiment_id, unit, split, windows, station_city, code_digest, digest, prepare_seconds,
                groups[slice_key])
            superseded = tracking.supersede_previous(client, experiment_id, identity, run_id) if supersede else []
            record = make_record(run_id, experiment, experiment_id, tracking_uri, split, job, seed, primary,
                                 metrics, superseded, reused=False)
        if record_path is None:  # a search trial: the record names its parent, logged once every trial is there
            trials.setdefault(index, []).append(record)
            continue
        write_json_atomic(record, record_path)
        done[index] = record
    for index, trial_records in trials.items():
        unit = units[index]
        parent = search_job.finish_cell(client, experiment_id, unit, trial_records,
                                        tags_for(split, unit["job"], unit["seed"], code_digest), supersede, reuse)
        record = make_record(parent["run_id"], experiment, experiment_id, tracking_uri, split, unit["job"],
                             unit["seed"], parent["primary"], parent["metrics"], parent["superseded"],
                             parent["reused"])
        record["search"] = parent["search"]
        write_json_atomic(record, record_paths[index])
        done[index] = record
    return [done[index] for index in range(len(units))]
