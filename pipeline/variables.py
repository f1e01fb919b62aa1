"""Canonical variables and site types, read from config/variables.yaml; QC flag codes.

Reads the project's config/variables.yaml (the shipped one when the project has none) once, on first use
(a study adds a variable or a site type there, with no code change); writes nothing. Every clean Parquet table uses exactly these variable names and units.
Ingestion converts delivered units into these and flags values outside the plausible range (flag, never
silently drop). Read by ingest, windows, features, demo and the report. A bad entry is an InputError
naming the file and the field (e.g. `variables.nox.high`).
"""

import math
import re
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import yaml

from pipeline.errors import InputError

PACKAGED_REGISTRY = Path(__file__).resolve().parents[1] / "config" / "variables.yaml"


_project_root = Path(".")  # Snakemake runs every rule in the project folder; the CLI sets its --root


def use_project(root) -> None:
    """Read the variables of the project at `root` (the command line's --root) from now on."""
    global _project_root
    _project_root = Path(root)


def registry_file() -> Path:
    """The project's own config/variables.yaml, else the shipped one: a study that adds a variable edits
    its project's file, not the installed package."""
    own = _project_root / "config" / "variables.yaml"
    return own.resolve() if own.is_file() else PACKAGED_REGISTRY
# Variable names become column and feature names: lower case, and never a QC column's `_qc` suffix.
_VARIABLE_NAME = re.compile(r"^[a-z][a-z0-9_]{0,39}$")
_ENTRY_KEYS = {"unit", "low", "high", "description", "molar_mass_g_per_mol"}


@dataclass(frozen=True)
class Variable:
    name: str
    unit: str
    low: float  # values below are physically impossible for a surface station
    high: float  # values above are physically impossible (or an instrument fault)
    description: str
    molar_mass_g_per_mol: float | None = None  # gases only: ppb <-> mass concentration


@dataclass(frozen=True)
class Registry:
    variables: tuple[Variable, ...]
    site_types: frozenset[str]


def _number(value, file: str, field: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(f"must be a finite number, got {value!r}", file=file, field=field)
    return float(value)


def _variable(name, entry, file: str) -> Variable:
    where = f"variables.{name}"
    if not isinstance(name, str) or not _VARIABLE_NAME.match(name) or name.endswith("_qc"):
        raise InputError("a variable name is lower-case letters, digits and _ (not ending in _qc)",
                         file=file, field=where)
    if not isinstance(entry, dict):
        raise InputError("must be a mapping with unit, low, high, description", file=file, field=where)
    for key in entry:
        if key not in _ENTRY_KEYS:
            raise InputError(f"unknown key (known: {', '.join(sorted(_ENTRY_KEYS))})", file=file,
                             field=f"{where}.{key}")
    for key in ("unit", "low", "high", "description"):
        if key not in entry:
            raise InputError("missing", file=file, field=f"{where}.{key}")
    low, high = _number(entry["low"], file, f"{where}.low"), _number(entry["high"], file, f"{where}.high")
    if low >= high:
        raise InputError(f"must be above low ({low})", file=file, field=f"{where}.high")
    mass = entry.get("molar_mass_g_per_mol")
    if mass is not None and _number(mass, file, f"{where}.molar_mass_g_per_mol") <= 0:
        raise InputError("must be positive", file=file, field=f"{where}.molar_mass_g_per_mol")
    return Variable(name, str(entry["unit"]), low, high, str(entry["description"]),
                    None if mass is None else float(mass))


def read_registry(path) -> Registry:
    """Read and check a variables file; the canonical units are checked by pipeline.units on first use."""
    file = str(path)
    try:
        content = yaml.safe_load(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError("variables file not found", file=file) from None
    except yaml.YAMLError as error:
        raise InputError(f"not valid YAML ({str(error).splitlines()[0]})", file=file) from None
    if not isinstance(content, dict) or set(content) != {"variables", "site_types"}:
        raise InputError("must hold exactly the keys variables and site_types", file=file, field="variables")
    if not isinstance(content["variables"], dict) or not content["variables"]:
        raise InputError("must be a non-empty mapping", file=file, field="variables")
    variables = tuple(_variable(name, entry, file) for name, entry in content["variables"].items())
    site_types = content["site_types"]
    if not isinstance(site_types, list) or not site_types:
        raise InputError("must be a non-empty list", file=file, field="site_types")
    for position, site_type in enumerate(site_types):
        if not isinstance(site_type, str) or not _VARIABLE_NAME.match(site_type):
            raise InputError(f"{site_type!r} is not a lower-case name", file=file, field=f"site_types[{position}]")
    return Registry(variables, frozenset(site_types))


def registry() -> Registry:
    return _registry_at(registry_file())


@lru_cache(maxsize=4)
def _registry_at(path: Path) -> Registry:
    return read_registry(path)


def __getattr__(name: str):
    """VARIABLE_NAMES, BY_NAME and SITE_TYPES are read from the file on first access (module attributes,
    so that callers keep `from pipeline.variables import BY_NAME`)."""
    if name == "CANONICAL_VARIABLES":
        return registry().variables
    if name == "VARIABLE_NAMES":
        return tuple(v.name for v in registry().variables)
    if name == "BY_NAME":
        return {v.name: v for v in registry().variables}
    if name == "SITE_TYPES":
        return registry().site_types
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


# QC flag codes stored in the `<variable>_qc` int8 columns of every clean table.
QC_OK = 0
QC_MISSING = 1  # not delivered (gap, empty cell, or the step was absent)
QC_SENTINEL = 2  # a delivered no-data code such as -999
QC_OUT_OF_RANGE = 3  # outside [low, high] after unit conversion
QC_UNPARSEABLE = 4  # text that is not a number
QC_INCOMPLETE = 5  # an aggregated step whose finer values fall short of the completeness rule
QC_FLAG_NAMES = {QC_OK: "ok", QC_MISSING: "missing", QC_SENTINEL: "sentinel",
                 QC_OUT_OF_RANGE: "out_of_range", QC_UNPARSEABLE: "unparseable", QC_INCOMPLETE: "incomplete"}


def qc_column(variable: str) -> str:
    return f"{variable}_qc"
