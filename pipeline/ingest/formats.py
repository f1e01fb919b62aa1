"""Validate a city's format dict (config `data.cities.<city>`) and fill in its defaults.

Reads nothing from disk. A format dict describes one city's raw dump completely, so a new city with a
new format needs only config. Keys (defaults in brackets):

  layout          wide_csv | long_csv | jsonl | station_columns_csv           (required)
  files           glob relative to raw_dir, e.g. "mycity/*.csv"; matched files are read in name order
                  [every file in the city's own folder: "<city>/*"]
  station_column  column (jsonl: field) holding the station code                (required)
  station_map     {code in the dump: station_id}                                [codes used as ids]
  time            {column: NAME | parts: {year, month, day, hour[, minute]},
                   format: strftime pattern | iso8601 (with UTC offset) | epoch_s,
                   timezone: tz database name (not needed for iso8601 / epoch_s) [UTC],
                   label: start | end (hour-ending stamps are shifted back one hour) [start],
                   ambiguous: order | dst | standard | drop [order], nonexistent: drop [drop],
                   earliest: first plausible UTC instant [1970-01-01],
                   latest: last plausible UTC instant [the time of ingestion; never later than it]}
  columns         wide_csv / jsonl: {column or dotted field path: canonical variable}
  units           wide_csv / jsonl: {canonical variable: delivered unit}; long_csv: optional fallback
  variable_column, value_column, unit_column, variables ({code: canonical})      long_csv only
  station_columns (the columns that are stations), variable (canonical)   station_columns_csv only
  separator [","] (one character)  decimal ["."]  header_line [1]  encoding ["utf-8"] (a BOM is skipped)
  sentinels [[]]  missing_values [["", "NA", "N/A", "#N/A", "NaN", "null", "None", "-"]] (any letter case)
  duplicates      keep_last | keep_first  (which of conflicting rows survives)  [keep_last]
  cadence         the study's time step the delivery is aligned to (10min, 15min, 1h, 1d, ...)  [1h]
  completeness    share of valid finer values an aggregated step needs (see cadence.py)     [0.75]
"""

import codecs
import copy
import zoneinfo

import pandas as pd

from pipeline.errors import InputError
from pipeline.ingest.cadence import DEFAULT_CADENCE, DEFAULT_COMPLETENESS, cadence_label, parse_cadence
from pipeline.units import conversion_to_canonical
from pipeline.variables import BY_NAME

LAYOUTS = ("wide_csv", "long_csv", "jsonl", "station_columns_csv")
_COMMON = {"layout", "files", "station_column", "station_map", "time", "sentinels", "missing_values",
           "duplicates", "encoding", "units", "cadence", "completeness"}
_CSV = {"separator", "decimal", "header_line"}
_ALLOWED = {
    "wide_csv": _COMMON | _CSV | {"columns"},
    "long_csv": _COMMON | _CSV | {"variable_column", "value_column", "unit_column", "variables"},
    "jsonl": _COMMON | {"columns", "decimal"},
    "station_columns_csv": _COMMON - {"station_column"} | _CSV | {"station_columns", "variable"},
}
_REQUIRED = {
    "wide_csv": ("station_column", "time", "columns", "units"),
    "long_csv": ("station_column", "time", "variable_column", "value_column", "variables"),
    "jsonl": ("station_column", "time", "columns", "units"),
    "station_columns_csv": ("station_columns", "variable", "time", "units"),
}
_TIME_KEYS = {"column", "parts", "format", "timezone", "label", "ambiguous", "nonexistent", "earliest", "latest"}
DEFAULTS = {"separator": ",", "decimal": ".", "header_line": 1, "encoding": "utf-8", "sentinels": [],
            "missing_values": ["", "NA", "N/A", "#N/A", "NaN", "null", "None", "-"], "duplicates": "keep_last",
            "station_map": {}, "units": {}, "cadence": DEFAULT_CADENCE, "completeness": DEFAULT_COMPLETENESS}
# Hourly monitoring networks report from the 1970s on; a stamp before that is a typo or a zero date.
# `latest` None means the time of ingestion: a reading cannot come from the future.
TIME_DEFAULTS = {"timezone": "UTC", "label": "start", "ambiguous": "order", "nonexistent": "drop",
                 "earliest": "1970-01-01T00:00Z", "latest": None}


def files_pattern(city: str, fmt: dict) -> str:
    """The city's `files` glob: by default every file in the city's own folder under raw_dir."""
    return fmt.get("files", f"{city}/*")


def _fail(message: str, config_file: str | None, field: str):
    raise InputError(message, file=config_file or "data config", field=field)


def _check_variables(mapping: dict, where: str, config_file):
    if not isinstance(mapping, dict) or not mapping:
        _fail("must be a non-empty mapping", config_file, where)
    targets = list(mapping.values())
    for raw, canonical in mapping.items():
        if canonical not in BY_NAME:
            _fail(f"'{raw}' maps to unknown variable '{canonical}' (known: {', '.join(BY_NAME)})",
                  config_file, f"{where}.{raw}")
        if targets.count(canonical) > 1:
            _fail(f"variable '{canonical}' is mapped from more than one column", config_file, where)


def validate_format(city: str, fmt: dict, reference_temperature_c: float = 25.0,
                    config_file: str | None = None) -> dict:
    """Return a copy of `fmt` with defaults filled in; InputError naming the bad field otherwise."""
    prefix = f"cities.{city}"
    if not isinstance(fmt, dict):
        _fail("must be a mapping", config_file, prefix)
    layout = fmt.get("layout")
    if layout not in LAYOUTS:
        _fail(f"unknown layout '{layout}' (known: {', '.join(LAYOUTS)})", config_file, f"{prefix}.layout")
    for key in fmt:
        if key not in _ALLOWED[layout]:
            _fail(f"unknown key for layout {layout}", config_file, f"{prefix}.{key}")
    for key in _REQUIRED[layout]:
        if key not in fmt:
            _fail(f"missing (required for layout {layout})", config_file, f"{prefix}.{key}")
    spec = copy.deepcopy(DEFAULTS)
    spec.update(copy.deepcopy(fmt))
    spec["files"] = files_pattern(city, fmt)
    if not isinstance(spec["files"], str) or not spec["files"].strip():
        _fail("must be a glob relative to raw_dir, e.g. \"mycity/*.csv\"", config_file, f"{prefix}.files")
    time = spec["time"]
    if not isinstance(time, dict) or set(time) - _TIME_KEYS:
        _fail(f"must be a mapping with keys among {sorted(_TIME_KEYS)}", config_file, f"{prefix}.time")
    if ("column" in time) == ("parts" in time):
        _fail("give exactly one of column or parts", config_file, f"{prefix}.time")
    if "parts" in time and not {"year", "month", "day", "hour"} <= set(time["parts"]):
        _fail("parts needs year, month, day and hour", config_file, f"{prefix}.time.parts")
    if "parts" in time:  # the reader joins the parts itself, so it fixes the pattern too
        time["format"] = "%Y-%m-%d %H:%M" if "minute" in time["parts"] else "%Y-%m-%d %H"
    if not time.get("format"):
        _fail("missing", config_file, f"{prefix}.time.format")
    for key, value in TIME_DEFAULTS.items():
        time.setdefault(key, value)
    choices = {"label": ("start", "end"), "ambiguous": ("order", "dst", "standard", "drop"),
               "nonexistent": ("drop",)}
    for key, allowed in choices.items():
        if time[key] not in allowed:
            _fail(f"'{time[key]}' is not one of {', '.join(allowed)}", config_file, f"{prefix}.time.{key}")
    try:
        zoneinfo.ZoneInfo(str(time["timezone"]))
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        _fail(f"unknown time zone '{time['timezone']}' (use a tz database name such as CET or "
              f"Etc/GMT-1)", config_file, f"{prefix}.time.timezone")
    for key in ("earliest", "latest"):
        if time[key] is not None:
            time[key] = _instant(time[key], config_file, f"{prefix}.time.{key}")
    if time["latest"] is not None and pd.Timestamp(time["latest"]) <= pd.Timestamp(time["earliest"]):
        _fail("must be later than time.earliest", config_file, f"{prefix}.time.latest")
    spec["cadence"] = cadence_label(parse_cadence(spec["cadence"], config_file, f"{prefix}.cadence"))
    completeness = spec["completeness"]
    if isinstance(completeness, bool) or not isinstance(completeness, (int, float)) or not 0 < completeness <= 1:
        _fail(f"must be a share in (0, 1], got {completeness!r}", config_file, f"{prefix}.completeness")
    if spec["duplicates"] not in ("keep_last", "keep_first"):
        _fail("must be keep_last or keep_first", config_file, f"{prefix}.duplicates")
    if layout == "station_columns_csv":
        if not isinstance(spec["station_columns"], list) or not spec["station_columns"]:
            _fail("must be a non-empty list of column names", config_file, f"{prefix}.station_columns")
        if spec["variable"] not in BY_NAME:
            _fail(f"unknown variable '{spec['variable']}' (known: {', '.join(BY_NAME)}; a new one goes into "
                  f"config/variables.yaml)", config_file, f"{prefix}.variable")
        spec["columns"] = {spec["variable"]: spec["variable"]}  # every cell holds this one variable
    if layout == "long_csv":
        _check_variables(spec["variables"], f"{prefix}.variables", config_file)
        if "unit_column" not in spec and not spec["units"]:
            _fail("long_csv needs unit_column or units", config_file, f"{prefix}.unit_column")
    else:
        _check_variables(spec["columns"], f"{prefix}.columns", config_file)
        for canonical in spec["columns"].values():
            if canonical not in spec["units"]:
                _fail(f"no unit given for '{canonical}'", config_file, f"{prefix}.units.{canonical}")
    for canonical, unit in spec["units"].items():
        # Raises InputError for unknown units or impossible conversions, naming the field.
        field = f"{prefix}.units.{canonical}"
        try:
            conversion_to_canonical(canonical, unit, reference_temperature_c, where=field)
        except InputError as error:
            _fail(str(error).removeprefix(f"{field}: "), config_file, field)
    try:
        spec["sentinels"] = [float(s) for s in spec["sentinels"]]
    except (TypeError, ValueError):
        _fail("must be a list of numbers", config_file, f"{prefix}.sentinels")
    spec["missing_values"] = [str(s) for s in spec["missing_values"]]
    if not isinstance(spec["header_line"], int) or spec["header_line"] < 1:
        _fail("must be a positive line number", config_file, f"{prefix}.header_line")
    for key in ("separator", "decimal"):
        if not isinstance(spec[key], str) or len(spec[key]) != 1 or spec[key] in "\r\n\"":
            _fail(f"must be one character other than a quote or a line end, got {spec[key]!r}", config_file,
                  f"{prefix}.{key}")
    try:
        codecs.lookup(str(spec["encoding"]))
    except LookupError:
        _fail(f"unknown encoding {spec['encoding']!r} (e.g. utf-8, latin-1, cp1252)", config_file,
              f"{prefix}.encoding")
    return spec


def _instant(value, config_file, field: str) -> str:
    """A configured instant as a canonical UTC ISO string (naive text is read as UTC)."""
    try:
        stamp = pd.Timestamp(str(value))
    except (ValueError, TypeError):
        _fail(f"{value!r} is not a date or an ISO 8601 instant", config_file, field)
    if pd.isna(stamp):
        _fail(f"{value!r} is not a date or an ISO 8601 instant", config_file, field)
    stamp = stamp.tz_localize("UTC") if stamp.tzinfo is None else stamp.tz_convert("UTC")
    return stamp.isoformat()
