"""The DAG plan computed at Snakefile parse time: config, cities, splits, training jobs and their params.

Reads the Hydra config (overrides passed as `snakemake --config overrides="..."`) and the station table;
never reads data, so adding data never changes the job list. Composes once per model x penalty pair
(~66 ms each, STACK-NOTES), not once per job. Each job's params are sorted-key JSON of exactly its config
slice plus the digest of the code it runs, which is what makes re-runs minimal.
"""

from __future__ import annotations

import shlex
from dataclasses import dataclass, field
from pathlib import Path

from omegaconf import DictConfig

from pipeline import provenance
from pipeline.config import (NOT_APPLICABLE, canonical_json, compose_config, expand_sweep_overrides, job_slice,
                             to_container, validate)
from pipeline.errors import InputError
from pipeline.splits import plan_splits
from pipeline.stations import load_stations
from pipeline.tracking import resolve_tracking_uri


@dataclass
class TrainJob:
    split_id: str
    model: str
    penalty: str
    seeds: list[int]
    params_json: str
    code_digest: str


@dataclass
class WorkflowPlan:
    cfg: DictConfig
    overrides: list[str]
    root: Path
    cities: list[str]
    splits: dict[str, dict]
    jobs: dict[tuple[str, str, str], TrainJob] = field(default_factory=dict)

    @property
    def results_dir(self) -> str:
        return self.cfg.results_dir

    @property
    def tracking_uri(self) -> str:
        return resolve_tracking_uri(self.cfg.tracking.uri, self.root / self.cfg.results_dir)

    def clean_path(self, city: str) -> str:
        return f"{self.cfg.data.clean_dir}/{city}.parquet"

    def split_cities(self, split_id: str) -> list[str]:
        split = self.splits[split_id]
        return sorted(set(split["sources"]) | {split["target"]})

    def run_record(self, job: TrainJob, seed: int) -> str:
        return f"{self.results_dir}/runs/{job.split_id}/{job.model}/{job.penalty}/{seed}.json"

    def all_run_records(self) -> list[str]:
        return [self.run_record(job, seed) for job in self.jobs.values() for seed in job.seeds]

    def stage_digest(self, stage: str) -> str:
        """Digest of the code one stage runs (ingest, splits, aggregate), passed as a rule param."""
        return provenance.source_digest(provenance.STAGE_CODE[stage])

    def city_format(self, city: str) -> dict:
        return to_container(self.cfg.data.cities[city])


def parse_overrides(text: str | list | None) -> list[str]:
    if not text:
        return []
    return list(text) if isinstance(text, (list, tuple)) else shlex.split(str(text))


def _is_trainable(model_cfg: dict) -> bool:
    from pipeline.models import MODEL_FAMILIES

    return bool(MODEL_FAMILIES[model_cfg["family"]].trainable)


def plan_workflow(overrides: str | list | None = None, root: Path | str = ".") -> WorkflowPlan:
    root = Path(root).resolve()
    overrides = expand_sweep_overrides(parse_overrides(overrides))
    cfg = compose_config(overrides, root)
    validate(cfg)
    stations = load_stations(root / cfg.data.stations)
    configured = set(cfg.data.cities)
    cities = sorted(c for c in stations["city"].unique() if c in configured)
    missing = sorted(set(stations["city"]) - configured)
    if missing:
        raise InputError(f"cities in the station table have no dump format: {', '.join(missing)}",
                         file=str(cfg.data.stations), field="city")
    split_cfg = to_container(cfg.split)
    if split_cfg.get("cities"):  # the study is restricted to these cities: ingest and diagnose only them
        unknown = sorted(set(split_cfg["cities"]) - set(cities))
        if unknown:
            raise InputError(f"unknown cities: {', '.join(unknown)}", file="config", field="split.cities")
        cities = sorted(split_cfg["cities"])
    splits = {item["split_id"]: item for item in
              plan_splits(split_cfg, stations[stations["city"].isin(cities)],
                          cfg.forecast.lookback_hours, cfg.forecast.horizon_hours)}
    plan = WorkflowPlan(cfg=cfg, overrides=overrides, root=root, cities=cities, splits=splits)
    for model_name in cfg.sweep.models:
        pair_cfg = compose_config([*overrides, f"model={model_name}"], root)
        trainable = _is_trainable(to_container(pair_cfg.model))
        penalties = list(cfg.sweep.penalties) if trainable else [NOT_APPLICABLE]
        seeds = list(cfg.sweep.seeds) if trainable else [0]
        digest = provenance.training_code_digest(pair_cfg.model.family)
        for penalty_name in penalties:
            if penalty_name != NOT_APPLICABLE:
                pair_cfg = compose_config([*overrides, f"model={model_name}", f"penalty={penalty_name}"], root)
                validate(pair_cfg)
            params_json = canonical_json(job_slice(pair_cfg, model_name, penalty_name))
            for split_id in splits:
                plan.jobs[(split_id, model_name, penalty_name)] = TrainJob(
                    split_id, model_name, penalty_name, seeds, params_json, digest)
    return plan
