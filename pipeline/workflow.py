"""The DAG plan computed at Snakefile parse time: config, cities, splits, training jobs and their params.

Reads the Hydra config (overrides passed as `snakemake --config overrides="..."`), the station table and
the package's source files (for code digests); never reads data, so adding data never changes the job
list. Composes with Hydra twice whatever the number of model x penalty pairs (pipeline.config_variants
derives each pair's config), and only when the plan's inputs changed: otherwise the plan
comes from pipeline.plan_cache (read/written under `.snakemake/shiftgrid-plans/`).
Each job's params are sorted-key JSON of exactly its config slice plus the digest of the code it runs (the
rule script's import closure, pipeline.provenance), which is what makes re-runs minimal. Nothing that
depends on where the project folder sits enters them, so a copied or moved project stays up to date.
Several forecast targets (sweep.targets, `target=pm25,no2`) need no further composition: each unit's job
slice gets its variable, each trained model gets a job per split and variable, and run records sit under
runs/<variable>/; one target plans exactly as before (same params, same paths).
Config keys obeyed: data.*, split.*, forecast.*, sweep.*, search.* (each run's trials, pipeline.search),
model/penalty/fit/selection/metrics (job slices), report.* (aggregation params), tracking.* and results_dir.
Imports neither torch nor MLflow, and Hydra and pandas only when it composes.
"""

from __future__ import annotations

import os
import shlex
from dataclasses import dataclass, field, fields
from pathlib import Path

from pipeline import environments, plan_cache, provenance, twins
from pipeline.canonical import ConfigNode, canonical_json, to_container
from pipeline.errors import InputError
from pipeline.tracking import hide_credentials, resolve_tracking_uri


BASELINES = "baselines"  # model key of a split's job that fits every closed-form family on it


@dataclass
class TrainJob:
    """One Snakemake job: a split x gradient-trained model (every penalty and seed), or the closed-form
    baselines of one split. Units are the runs it produces, in the order of the rule's outputs."""
    split_id: str
    model: str  # sweep model name, or BASELINES
    units: list[dict]  # {"split_id", "model", "penalty", "seed", "job": config slice[, "search": trials]}
    code_digest: str
    versions: str = ""  # library versions its code imports, when tracking.dependency_changes=rerun
    target: str = ""  # its forecast variable when the sweep has several ("": one target, or the baselines)

    @property
    def key(self) -> tuple:
        """Its key in WorkflowPlan.jobs: (split_id, model), plus the forecast variable when there are several."""
        return (self.split_id, self.model, self.target) if self.target else (self.split_id, self.model)

    @property
    def params_json(self) -> str:
        # a searched unit adds its trials (pipeline.search); without a search the params stay as they were
        return canonical_json([{"split_id": u["split_id"], "job": u["job"], "seed": u["seed"],
                                **({"search": u["search"]} if u.get("search") else {})} for u in self.units])


@dataclass
class WorkflowPlan:
    cfg: ConfigNode  # the composed, validated configuration as plain data
    overrides: list[str]
    root: Path
    cities: list[str]
    splits: dict[str, dict]
    jobs: dict[tuple[str, str], TrainJob] = field(default_factory=dict)
    trainable_models: list[str] = field(default_factory=list)
    baseline_models: list[str] = field(default_factory=list)
    rule_code: dict[str, dict] = field(default_factory=dict)  # rule -> {"code", "versions"} (no families)
    targets: list[str] = field(default_factory=list)  # forecast variables (config.forecast_targets)

    @property
    def several_targets(self) -> bool:
        """Several forecast variables: each run's paths carry its variable (one target keeps today's paths)."""
        return len(self.targets) > 1

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

    def run_record(self, split_id: str, unit: dict) -> str:
        variable = f"{unit_target(unit)}/" if self.several_targets else ""
        return f"{self.results_dir}/runs/{variable}{split_id}/{unit['model']}/{unit['penalty']}/{unit['seed']}.json"

    def job(self, split_id: str, model: str, target: str | None = None) -> "TrainJob":
        """The training job of a split and model (and forecast variable, when there are several)."""
        return self.jobs[(split_id, model, target) if self.several_targets and target else (split_id, model)]

    def baselines_job(self, split_id: str) -> "TrainJob":
        """The job that fits every closed-form family on this split (every forecast variable of it)."""
        return self.jobs[(split_id, BASELINES)]

    def baseline_record_patterns(self) -> list[str]:
        """The fit_baselines rule's outputs, with a {split_id} wildcard, in the order of its job's units
        (every split's baselines job has the same units, bar the split)."""
        first = self.baselines_job(next(iter(self.splits)))
        return [self.run_record("{split_id}", unit) for unit in first.units]

    def records_of(self, job: TrainJob) -> list[str]:
        return [self.run_record(unit["split_id"], unit) for unit in job.units]

    def all_run_records(self) -> list[str]:
        return [path for job in self.jobs.values() for path in self.records_of(job)]

    def code_digest(self, rule: str, families: list[str] | None = None) -> str:
        """Digest of the code one rule's job runs (its script's import closure), passed as a rule param."""
        if families is None and rule in self.rule_code:
            return self.rule_code[rule]["code"]
        return provenance.code_digest(rule, families)

    def versions(self, rule: str, families: list[str] | None = None) -> str:
        """The `versions` param of a rule: the result-relevant library versions its code imports when
        tracking.dependency_changes is "rerun" (so an upgrade re-runs it), else "" (status only reports)."""
        if families is None and rule in self.rule_code:
            return self.rule_code[rule]["versions"]
        if self.cfg.tracking.dependency_changes != "rerun":
            return ""
        return canonical_json(provenance.rule_dependencies(rule, families))

    def to_data(self) -> dict:
        """The plan as JSON-able data (pipeline.plan_cache stores it); `from_data` restores it."""
        return {"cfg": to_container(self.cfg), "overrides": self.overrides, "cities": self.cities,
                "splits": self.splits, "jobs": [job_data(job) for job in self.jobs.values()],
                "trainable_models": self.trainable_models, "baseline_models": self.baseline_models,
                "rule_code": self.rule_code, "targets": self.targets}

    @classmethod
    def from_data(cls, data: dict, root: Path) -> "WorkflowPlan":
        jobs = [TrainJob(**job) for job in data["jobs"]]
        return cls(cfg=ConfigNode(data["cfg"]), overrides=data["overrides"], root=root,
                   cities=data["cities"], splits=data["splits"], jobs={j.key: j for j in jobs},
                   trainable_models=data["trainable_models"], baseline_models=data["baseline_models"],
                   rule_code=data["rule_code"], targets=data["targets"])

    def city_format(self, city: str) -> dict:
        return to_container(self.cfg.data.cities[city])


def job_data(job: TrainJob) -> dict:
    """A job's fields as data for JSON: its units are not copied (dataclasses.asdict deep-copies every
    job slice, seconds for experiment=full's thousands of units)."""
    return {item.name: getattr(job, item.name) for item in fields(TrainJob)}


def unit_target(unit: dict) -> str:
    """The forecast variable of a planned unit (its job slice holds it)."""
    return unit["job"]["forecast"]["target"]


def _for_target(job: dict, target: str) -> dict:
    """A job slice with its forecast variable set: the variable is part of the slice, so of the digest."""
    return {**job, "forecast": {**job["forecast"], "target": target}}


def parse_overrides(text: str | list | None) -> list[str]:
    """The override list. A `tracking.uri` with credentials moves to this process's MLFLOW_TRACKING_URI
    (jobs inherit it) and stays redacted here, so no plan, cache entry or param holds the credentials."""
    if not text:
        return []
    overrides = list(text) if isinstance(text, (list, tuple)) else shlex.split(str(text))
    return hide_credentials(overrides, os.environ)


def _is_trainable(model_cfg: dict) -> bool:
    from pipeline.models import MODEL_FAMILIES

    return bool(MODEL_FAMILIES[model_cfg["family"]].trainable)


def plan_workflow(overrides: str | list | None = None, root: Path | str = ".", cache: bool = True) -> WorkflowPlan:
    """The plan of the project folder `root` under these overrides: from the cache when its inputs are
    unchanged (pipeline.plan_cache), else composed (and stored)."""
    root = Path(root).resolve()
    overrides = parse_overrides(overrides)
    key = plan_cache.plan_key(overrides, root)
    data = plan_cache.load(root, key) if cache else None
    if data is not None:
        return WorkflowPlan.from_data(data, root)
    plan = compose_plan(overrides, root)
    for rule in provenance.rule_scripts():  # every non-training rule's code identity, stored with the plan
        plan.rule_code[rule] = {"code": plan.code_digest(rule), "versions": plan.versions(rule)}
    plan_cache.store(root, key, plan.to_data(), inputs=[str(plan.cfg.data.stations)],
                     holds_versions=plan.cfg.tracking.dependency_changes == "rerun")
    return plan


def plan_config(overrides: str | list | None = None, root: Path | str = ".") -> ConfigNode:
    """The composed configuration alone (commands that only locate results and the store): the cached
    plan's when there is one (no Hydra, no pandas), else composed once (not once per model x penalty)."""
    root = Path(root).resolve()
    overrides = parse_overrides(overrides)
    data = plan_cache.load(root, plan_cache.plan_key(overrides, root))
    if data is not None:
        return ConfigNode(data["cfg"])
    from pipeline.config import compose_config, expand_sweep_overrides

    return ConfigNode(to_container(compose_config(expand_sweep_overrides(overrides), root)))


def compose_plan(overrides: list[str], root: Path) -> WorkflowPlan:
    """Compose the configuration (Hydra twice: pipeline.config_variants) and plan cities, splits, jobs."""
    from pipeline import search
    from pipeline.config import expand_sweep_overrides, forecast_targets, job_slice, validate
    from pipeline.config_variants import VariantComposer
    from pipeline.names import NOT_APPLICABLE
    from pipeline.splits import plan_splits
    from pipeline.stations import load_stations

    overrides = expand_sweep_overrides(overrides)
    variants = VariantComposer(overrides, root)  # two Hydra compositions serve every model x penalty
    cfg = variants.base
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
    plan = WorkflowPlan(cfg=ConfigNode(to_container(cfg)), overrides=overrides, root=root, cities=cities,
                        splits=splits, targets=forecast_targets(cfg))
    search_cfg = to_container(cfg.search)
    search.check_config(search_cfg, root / "config")
    baseline_units, baseline_families = [], []
    for model_name in cfg.sweep.models:
        model_cfg = variants.compose(model_name)
        family = model_cfg.model.family
        if not _is_trainable(to_container(model_cfg.model)):
            # Closed-form families take well under a second per split: one job per split fits them all,
            # so start-up is paid once per split, not per family, and a split's baselines depend on its
            # own cities only (new data for one city re-fits the baselines of its splits alone).
            plan.baseline_models.append(model_name)
            baseline_families.append(family)
            baseline_units += search.attach([{"model": model_name, "penalty": NOT_APPLICABLE, "seed": 0,
                                              "job": _for_target(job_slice(model_cfg, model_name, NOT_APPLICABLE),
                                                                 target)} for target in plan.targets],
                                            search_cfg, trainable=False)
            continue
        if model_name == BASELINES:  # its jobs' keys would be those of the splits' baselines jobs
            raise InputError(f"a gradient-trained model may not be named {BASELINES!r}", file="config",
                             field="sweep.models")
        plan.trainable_models.append(model_name)
        units = []
        for penalty_name in cfg.sweep.penalties:
            pair_cfg = variants.compose(model_name, penalty_name)
            validate(pair_cfg)
            units += [{"model": model_name, "penalty": penalty_name, "seed": seed,
                       "job": _for_target(job_slice(pair_cfg, model_name, penalty_name), target)}
                      for target in plan.targets for seed in cfg.sweep.seeds]
        units = search.attach(units, search_cfg, trainable=True)  # the trials of each run, if searched
        # Plan time, not job time: a penalised run with one training environment is ERM in disguise, and
        # an ERM twin trained under another protocol is no twin (pipeline.environments, pipeline.twins);
        # checked for every trial of a search.
        environments.check_units(splits, search.trial_units(units),
                                 dict(zip(stations["station_id"].astype(str), stations["city"].astype(str))))
        twins.check_units(search.trial_units(units))
        digest, versions = plan.code_digest("train_model", [family]), plan.versions("train_model", [family])
        for split_id in splits:  # one job per split x model (x forecast variable: its windows differ)
            for target in plan.targets:
                job = TrainJob(split_id, model_name, [{"split_id": split_id, **u} for u in units
                                                      if unit_target(u) == target], digest, versions,
                               target if plan.several_targets else "")
                plan.jobs[job.key] = job
    if baseline_units:
        families = sorted(set(baseline_families))
        digest, versions = plan.code_digest("fit_baselines", families), plan.versions("fit_baselines", families)
        for split_id in splits:
            job = TrainJob(split_id, BASELINES, [{"split_id": split_id, **unit} for unit in baseline_units],
                           digest, versions)
            plan.jobs[job.key] = job
    return plan
