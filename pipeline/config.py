"""Typed, validated configuration: Hydra schema, composition, sweep overrides and per-job slices.

Reads the Hydra tree under `config/` (groups data/, split/, model/, penalty/, fit/, selection/,
experiment/). The dataclasses below, registered in Hydra's ConfigStore, are the schema (the `search`
key's is pipeline.search.SearchConfig, checked where the plan builds the trials): a key that is not
in the schema, or a value of the wrong type, fails at composition, before any job runs. Model families
carry their own `Params` dataclass, so `model` is checked by building the family (see `validate`).

Sweeps belong to Snakemake, not to Hydra multirun: `model=lstm,gru` on the command line becomes
`sweep.models=[lstm,gru]` (see `expand_sweep_overrides`), and the plan needs one configuration per
model x penalty pair: VariantComposer derives them all from two Hydra compositions.
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
from omegaconf import DictConfig, OmegaConf
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


PROBE = "_shiftgrid_probe"  # name of the probe options of the model and penalty groups (ConfigStore)
# A probe option sets every key a group file sets to a value no file or override uses, so that after
# composition a key still at its probe value was set by no later layer. (MISSING would not do: a merge
# keeps the value below a MISSING one, so the schema's defaults would show through.)
_PROBE_SCALARS = {"weight": -1.0e308, "warmup_steps": -(2 ** 62)}  # typed keys of PenaltyConfig
# Groups whose option changes per job; every other group is the same for every model x penalty.
VARIANT_GROUPS = ("model", "penalty")
_VARIANT_SCHEMA = {"model": lambda: OmegaConf.create(RootConfig().model),
                   "penalty": lambda: OmegaConf.structured(PenaltyConfig)}


class VariantComposer:
    """The configuration of each sweep model (x penalty) without one Hydra composition each.

    Hydra builds the `model` node as: the schema's default, then the chosen model/<name>.yaml, then the
    layers after it in the defaults list (config.yaml's own keys, the experiment file), then the
    command-line `model.*` overrides; no other node depends on the choice. So two compositions serve every
    variant: the base one, and one with the probe options (PROBE_VALUES), whose `model` and `penalty`
    nodes, less the keys still at their probe value, hold exactly what the later layers set. A variant is
    the base with `model` = merge(schema default, group file, those layers), likewise `penalty`. Where that is not provably what Hydra does (a group file with its own defaults list or
    @package header, a `+`/`~` override of a model or penalty key, which Hydra checks against the group
    file's keys), or any error, the variant is composed by Hydra itself. tests/test_config.py checks
    equality for every shipped experiment, model and penalty.
    """

    def __init__(self, overrides: list[str], root: Path | str = "."):
        self.overrides, self.root = list(overrides), Path(root)
        self.base = compose_config(self.overrides, root)
        self._groups: dict[tuple[str, str], Any] = {}  # (group, option) -> its file's node, None: use Hydra
        self.later_layers = None if self._edits_group_keys() else self._later_layers()

    def _probe_values(self, group: str) -> dict:
        """The probe option of a group: every key (and key of `extra`) its files set, at a probe value."""
        keys, extra = {"family"} if group == "model" else set(_VARIANT_SCHEMA[group]()), set()
        for path in sorted((config_dir(self.root) / group).glob("*.yaml")):
            node = self._group_file(group, path.stem)
            if node is not None:
                keys |= set(node)
                extra |= set(node.get("extra") or {}) if group == "penalty" else set()
        values = {key: _PROBE_SCALARS.get(key, PROBE) for key in keys}
        return {**values, "extra": {key: PROBE for key in extra}} if group == "penalty" else values

    def _later_layers(self) -> dict | None:
        """group -> what the layers after its group file set in its node (a composition with the probes);
        None when that composition fails (a variant is then composed by Hydra, with Hydra's message)."""
        probes = {group: self._probe_values(group) for group in VARIANT_GROUPS}
        for group, values in probes.items():
            ConfigStore.instance().store(group=group, name=PROBE, node=values)
        try:
            probe = compose_config([*self.overrides, *(f"{group}={PROBE}" for group in VARIANT_GROUPS)], self.root)
        except InputError:
            return None
        return {group: OmegaConf.create(_unset_removed(OmegaConf.to_container(probe[group], resolve=False),
                                                       probes[group]))  # interpolations resolve in the variant
                for group in VARIANT_GROUPS}

    def _overridden_keys_exist(self, group: str, node) -> bool:
        """Hydra refuses a command-line `group.key=value` whose key the chosen file lacks: so must we."""
        for item in self.overrides:
            key = item.partition("=")[0]
            head, _, path = key.partition(".")
            if head == group and path and OmegaConf.select(node, path, default=_ABSENT) is _ABSENT:
                return False
        return True

    def _edits_group_keys(self) -> bool:
        keys = [item.partition("=")[0] for item in self.overrides]
        return any(key[:1] in "+~" and key.lstrip("+~").partition(".")[0].partition("@")[0] in VARIANT_GROUPS
                   for key in keys)

    def _group_file(self, group: str, option: str):
        """The group option's YAML as Hydra reads it, or None when Hydra would do more than merge it."""
        if (group, option) not in self._groups:
            path = config_dir(self.root) / group / f"{option}.yaml"
            node = None
            if path.is_file():
                text = path.read_text(encoding="utf-8")
                loaded = OmegaConf.load(path)
                if "@package" not in text[:512] and isinstance(loaded, DictConfig) and "defaults" not in loaded:
                    node = loaded
            self._groups[(group, option)] = node
        return self._groups[(group, option)]

    def compose(self, model: str, penalty: str | None = None) -> DictConfig:
        """The configuration of `model=<model>` (and `penalty=<penalty>`) on top of the overrides."""
        choices = {"model": model, **({"penalty": penalty} if penalty is not None else {})}
        hydra_overrides = [*self.overrides, *(f"{group}={option}" for group, option in choices.items())]
        files = {group: self._group_file(group, option) for group, option in choices.items()}
        if self.later_layers is None or any(node is None for node in files.values()):
            return compose_config(hydra_overrides, self.root)
        try:
            cfg = self.base.copy()
            for group, node in files.items():
                chosen = OmegaConf.merge(_VARIANT_SCHEMA[group](), node)
                if not self._overridden_keys_exist(group, chosen):
                    return compose_config(hydra_overrides, self.root)
                cfg[group] = OmegaConf.merge(chosen, self.later_layers[group])
            return cfg
        except (OmegaConfBaseException, ValueError):  # e.g. a bad key in the group file: Hydra's own message
            return compose_config(hydra_overrides, self.root)


_ABSENT = object()


def _unset_removed(node: dict, probe: dict) -> dict:
    """A probe composition's group node less the keys still at their probe value (no later layer set them)."""
    kept = {}
    for key, value in node.items():
        if isinstance(value, dict) and isinstance(probe.get(key), dict):
            kept[key] = _unset_removed(value, probe[key])
        elif key not in probe or value != probe[key]:
            kept[key] = value
    return kept


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
