"""Typed, validated configuration: Hydra schema, composition, sweep overrides and per-job slices.

Reads the Hydra tree under `config/` (groups data/, split/, model/, penalty/, fit/, selection/,
experiment/). The dataclasses below, registered in Hydra's ConfigStore, are the schema (the `search`
key's is pipeline.search.SearchConfig, checked where the plan builds the trials): a key that is not
in the schema, or a value of the wrong type, fails at composition, before any job runs. Model families
carry their own `Params` dataclass, so `model` is checked by building the family (see `validate`).

Sweeps belong to Snakemake, not to Hydra multirun: `model=lstm,gru` on the command line becomes
`sweep.models=[lstm,gru]` (see `expand_sweep_overrides`), and the plan needs one configuration per
model x penalty pair: pipeline.config_variants.VariantComposer derives them all from two Hydra
compositions.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Optional

import yaml
from hydra import compose, initialize_config_dir
from hydra.core.config_store import ConfigStore
from hydra.errors import HydraException
from omegaconf import DictConfig
from omegaconf.errors import OmegaConfBaseException

from pipeline import selection
from pipeline.canonical import canonical_json, to_container  # noqa: F401 (re-exported: callers import them here)
from pipeline.errors import InputError
from pipeline.fit_config import FitConfig
from pipeline.names import ERM, NOT_APPLICABLE, check_name
from pipeline.search import SearchConfig
from pipeline.splits import SplitConfig
from pipeline.variables import BY_NAME
from pipeline.windows import ForecastConfig

DEPENDENCY_CHANGES = ("report", "rerun")  # values of tracking.dependency_changes


@dataclass
class DataConfig:
    name: str = "demo"
    stations: str = "config/stations.csv"
    raw_dir: str = "data/raw"
    clean_dir: str = "data/clean"
    qc_dir: str = "data/qc"
    reference_temperature_c: float = 25.0  # gas ppb -> ug/m3 reference (25 C: US EPA practice)
    generator: Optional[Dict[str, Any]] = None  # how `shiftgrid demo` writes raw dumps; None = real data
    cities: Dict[str, Any] = field(default_factory=dict)  # city -> dump format (see docs/ingest)
    # What the scenario's author knows about the spurious relation (keys: pipeline.verdict.GROUND_TRUTH_KEYS);
    # the report's verdict says where the penalty helped where it can and where it cannot. None = unknown
    # (real data): the report then omits that part.
    ground_truth: Optional[Dict[str, Any]] = None


@dataclass
class PenaltyConfig:
    name: str = ERM  # erm | irm | vrex | groupdro
    weight: float = 0.0
    warmup_steps: int = 0
    extra: Dict[str, Any] = field(default_factory=dict)  # penalty-specific, e.g. {eta: 0.01} for groupdro


@dataclass
class SelectionConfig:
    # The rule whose checkpoint gives a run's headline metrics.
    rule: str = selection.HOLDOUT
    # Further rules evaluated on the same fit and logged with a prefix, so the grid can show them side by
    # side. source-rotation costs one extra fit per source city, so it is opt-in.
    also: List[str] = field(default_factory=lambda: [selection.PEEK])


@dataclass
class SweepConfig:
    models: List[str] = field(default_factory=lambda: ["persistence", "ridge", "lstm"])
    penalties: List[str] = field(default_factory=lambda: ["erm", "irm"])
    seeds: List[int] = field(default_factory=lambda: [0, 1])
    # Forecast targets (`target=pm25,no2`): each is its own grid. Empty: forecast.target alone, with the file
    # paths of a single-target sweep (see forecast_targets).
    targets: List[str] = field(default_factory=list)


@dataclass
class MetricsConfig:
    # Exceedance scores (POD, FAR, CSI, ETS, bias) count hourly values above this threshold, in the target's
    # canonical unit, on each forecast hour. It is a research scoring threshold, not an alert level, and it is
    # applied to HOURLY values: 35 ug/m3 resembles a 24-h PM2.5 reference level, but no 24-h mean is formed
    # here, hence the name.
    hourly_exceedance_threshold: float = 35.0


@dataclass
class TrackingConfig:
    uri: Optional[str] = None  # None: SQLite store <results_dir>/mlflow.db inside the project folder
    experiment: str = "shiftgrid"
    # When a library that can change results (torch, numpy, pandas, pyarrow, scikit-learn, scipy, mlflow,
    # matplotlib; see pipeline.provenance.RESULT_LIBRARIES) or Python changes version: "report" names the
    # change in `shiftgrid status` and re-runs nothing; "rerun" also re-runs every job whose code imports it.
    dependency_changes: str = "report"


@dataclass
class ReportConfig:
    metric: str = "mae"  # any logged target metric: mae, rmse, mse, mase, csi, ...
    selection: str = selection.HOLDOUT
    bootstrap_samples: int = 2000
    top_rows: int = 12
    figure_dpi: int = 100
    title: str = "shiftgrid comparison"


@dataclass
class RootConfig:
    data: DataConfig = field(default_factory=DataConfig)
    split: SplitConfig = field(default_factory=SplitConfig)
    model: Dict[str, Any] = field(default_factory=lambda: {"family": "persistence"})
    penalty: PenaltyConfig = field(default_factory=PenaltyConfig)
    fit: FitConfig = field(default_factory=FitConfig)
    selection: SelectionConfig = field(default_factory=SelectionConfig)
    forecast: ForecastConfig = field(default_factory=ForecastConfig)
    sweep: SweepConfig = field(default_factory=SweepConfig)
    search: SearchConfig = field(default_factory=SearchConfig)  # hyperparameter search (pipeline.search)
    metrics: MetricsConfig = field(default_factory=MetricsConfig)
    tracking: TrackingConfig = field(default_factory=TrackingConfig)
    report: ReportConfig = field(default_factory=ReportConfig)
    results_dir: str = "results"


_REGISTERED: list[bool] = []  # storing the schema costs ~0.2 s: once per process is enough


def register_schema() -> None:
    if _REGISTERED:
        return
    store = ConfigStore.instance()
    store.store(name="schema", node=RootConfig)
    _REGISTERED.append(True)


# Command-line choices that mean "sweep over these" rather than "use this one".
_SWEEP_KEYS = {"model": "sweep.models", "penalty": "sweep.penalties", "seed": "sweep.seeds",
               "target": "sweep.targets"}
# Where the first choice goes, so the composed base config is a valid single run.
_FIRST_CHOICE = {"model": "model", "penalty": "penalty", "target": "forecast.target"}


def expand_sweep_overrides(overrides: list[str]) -> list[str]:
    """Turn `model=lstm,gru` / `penalty=irm` / `seed=0,1` / `target=pm25,no2` into sweep lists; keep
    everything else.

    The first choice of model and penalty is also kept as the group choice (of target: as
    forecast.target), so the composed base config is a valid single run (used by `validate` and by
    `shiftgrid verify`).
    """
    expanded = []
    for item in overrides:
        key, sep, value = item.partition("=")
        if sep and key in _SWEEP_KEYS and not value.startswith("["):
            choices = [v.strip() for v in value.split(",") if v.strip()]
            expanded.append(f"{_SWEEP_KEYS[key]}=[{','.join(choices)}]")
            if key in _FIRST_CHOICE:
                expanded.append(f"{_FIRST_CHOICE[key]}={choices[0]}")
        else:
            expanded.append(item)
    return expanded


def forecast_targets(cfg) -> list[str]:
    """The forecast variables of the sweep: sweep.targets, or forecast.target when it is empty."""
    return list(cfg.sweep.targets) or [str(cfg.forecast.target)]


def config_dir(root: Path | str = ".") -> Path:
    return (Path(root) / "config").resolve()


def compose_config(overrides: list[str] | tuple[str, ...] = (), root: Path | str = ".") -> DictConfig:
    """Compose the configuration with Hydra; a bad key or value raises InputError (one line)."""
    register_schema()
    _check_experiment(overrides, root)
    with _one_line_errors():
        with initialize_config_dir(config_dir=str(config_dir(root)), version_base="1.3"):
            return compose(config_name="config", overrides=list(overrides))


@contextlib.contextmanager
def _one_line_errors():
    """Hydra's, OmegaConf's and YAML's errors about the configuration as InputError (one line)."""
    try:
        yield
    except InputError:
        raise
    except (HydraException, OmegaConfBaseException) as error:  # bad key, value or group choice; bugs propagate
        lines = str(error).strip().splitlines() or [type(error).__name__]
        # "In 'data/x': ConfigKeyError raised while composing config:" names the key on the next line
        first_line = " ".join(lines[:2]) if lines[0].endswith(":") and len(lines) > 1 else lines[0]
        raise InputError(first_line, file="config", field="overrides") from None
    except yaml.YAMLError as error:  # e.g. a !!python tag: Hydra's loader is safe and refuses it
        mark = getattr(error, "problem_mark", None)
        raise InputError(str(getattr(error, "problem", None) or error).splitlines()[0],
                         file=mark.name if mark else "config", row=mark.line + 1 if mark else None,
                         field="yaml") from None


def _check_experiment(overrides, root) -> None:
    """The experiment group is optional in the defaults list, so Hydra would silently ignore a misspelt name."""
    folder = config_dir(root) / "experiment"
    for item in overrides:
        key, _, name = item.partition("=")
        if key.lstrip("+~") == "experiment" and name not in ("", "null") and not (folder / f"{name}.yaml").is_file():
            known = ", ".join(sorted(p.stem for p in folder.glob("*.yaml")))
            raise InputError(f"no experiment {name!r} (known: {known})", file="config", field="experiment")


def job_slice(cfg: DictConfig, model_name: str, penalty_name: str) -> dict:
    """Exactly the configuration a training job uses; nothing else may reach its params."""
    return {
        "model_name": model_name,
        "model": to_container(cfg.model),
        "penalty": to_container(cfg.penalty) if penalty_name != NOT_APPLICABLE else None,
        "penalty_name": penalty_name,
        "fit": to_container(cfg.fit),
        "selection": to_container(cfg.selection),
        "forecast": to_container(cfg.forecast),
        "metrics": to_container(cfg.metrics),
    }


def validate(cfg: DictConfig) -> None:
    """Checks that need code, not just types: rule names, model keys, penalty names."""
    from pipeline.models import MODEL_FAMILIES, build_model
    from pipeline.penalties import build_penalty

    for key in ("models", "penalties"):  # they become parts of file names, wildcards and tags
        for name in cfg.sweep[key]:
            check_name(name, file="config", field=f"sweep.{key}")
    for rule in [cfg.selection.rule, *cfg.selection.also, cfg.report.selection]:
        if rule not in selection.RULES:
            raise InputError(f"unknown selection rule {rule!r}; expected one of {', '.join(selection.RULES)}",
                             file="config", field="selection")
    model = dict(to_container(cfg.model))
    family = model.pop("family", None)
    if family not in MODEL_FAMILIES:
        raise InputError(f"unknown model family {family!r}; known: {', '.join(sorted(MODEL_FAMILIES))}",
                         file="config", field="model.family")
    build_model(family, model, seed=0)  # parameter names ...
    MODEL_FAMILIES[family].Params(**model)  # ... and values, before any job runs (no torch: dataclasses only)
    from pipeline.verdict import check_ground_truth

    check_ground_truth(to_container(cfg.data.ground_truth), list(cfg.data.cities))
    penalty = to_container(cfg.penalty)
    build_penalty(penalty["name"], weight=penalty["weight"], warmup_steps=penalty["warmup_steps"],
                  **penalty["extra"])
    if cfg.tracking.dependency_changes not in DEPENDENCY_CHANGES:
        raise InputError(f"must be one of {', '.join(DEPENDENCY_CHANGES)}, got {cfg.tracking.dependency_changes!r}",
                         file="config", field="tracking.dependency_changes")
    targets = forecast_targets(cfg)
    for target in targets:  # each becomes part of file names, wildcards and tags
        check_name(target, file="config", field="sweep.targets")
        if target not in BY_NAME:
            raise InputError(f"unknown forecast target {target!r}; known: {', '.join(BY_NAME)}", file="config",
                             field="sweep.targets")
    if len(set(targets)) != len(targets):
        raise InputError(f"a target is listed twice: {targets}", file="config", field="sweep.targets")
    if not cfg.sweep.seeds:
        raise InputError("at least one seed is needed", file="config", field="sweep.seeds")
