"""Canonical variables: names, units and physically possible ranges.

Every clean Parquet table uses exactly these column names and units. Ingestion converts delivered units
into these and flags values outside the plausible range (flag, never silently drop). Read by ingest,
windows, demo and the report.
"""

from dataclasses import dataclass


@dataclass(frozen=True)
class Variable:
    name: str
    unit: str
    low: float  # values below are physically impossible for a surface station
    high: float  # values above are physically impossible (or an instrument fault)
    description: str


# Ranges are generous on purpose: they catch instrument faults and unit mix-ups, not episodes.
CANONICAL_VARIABLES: tuple[Variable, ...] = (
    Variable("pm25", "ug/m3", 0.0, 1500.0, "fine particulate matter PM2.5"),
    Variable("pm10", "ug/m3", 0.0, 3000.0, "particulate matter PM10"),
    Variable("no2", "ug/m3", 0.0, 2000.0, "nitrogen dioxide"),
    Variable("co", "mg/m3", 0.0, 120.0, "carbon monoxide"),
    Variable("o3", "ug/m3", 0.0, 1000.0, "ozone"),
    Variable("so2", "ug/m3", 0.0, 3000.0, "sulphur dioxide"),
    Variable("temp_c", "degC", -60.0, 60.0, "air temperature"),
    Variable("rh_pct", "%", 0.0, 100.0, "relative humidity"),
    Variable("wind_speed_ms", "m/s", 0.0, 75.0, "wind speed"),
    Variable("wind_dir_deg", "deg", 0.0, 360.0, "wind direction, degrees from north"),
    Variable("pressure_hpa", "hPa", 500.0, 1100.0, "air pressure"),
    Variable("precip_mm", "mm", 0.0, 300.0, "precipitation in the hour"),
    Variable("aux", "index", -1e6, 1e6, "city-specific auxiliary signal (e.g. a traffic index)"),
)

VARIABLE_NAMES: tuple[str, ...] = tuple(v.name for v in CANONICAL_VARIABLES)
BY_NAME: dict[str, Variable] = {v.name: v for v in CANONICAL_VARIABLES}

# QC flag codes stored in the `<variable>_qc` int8 columns of every clean table.
QC_OK = 0
QC_MISSING = 1  # not delivered (gap, empty cell, or the hour was absent)
QC_SENTINEL = 2  # a delivered no-data code such as -999
QC_OUT_OF_RANGE = 3  # outside [low, high] after unit conversion
QC_UNPARSEABLE = 4  # text that is not a number
QC_FLAG_NAMES = {QC_OK: "ok", QC_MISSING: "missing", QC_SENTINEL: "sentinel",
                 QC_OUT_OF_RANGE: "out_of_range", QC_UNPARSEABLE: "unparseable"}


def qc_column(variable: str) -> str:
    return f"{variable}_qc"
