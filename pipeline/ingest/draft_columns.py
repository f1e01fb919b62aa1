"""Drafting a city's format, the columns part: which variable a column (or a long dump's code) holds, in which
unit, which column holds the station, and which numbers are no-data codes.

Reads and writes nothing: pipeline.ingest.draft hands over the sample's text columns. Names are matched
against the canonical variables (pipeline.variables, config/variables.yaml) and the spellings agencies use
for them (SYNONYMS); units against the spellings pipeline.units knows. Where a unit cannot be read from the
header, the values decide when they can (a pressure near 1000 is in hPa, near 30 in inHg); gases, wind speed
and rain stay guesses: the same numbers fit several units.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import pandas as pd

from pipeline.units import normalise_unit
from pipeline.variables import BY_NAME

# Spellings seen in deliveries (lower case, separators removed) -> canonical variable. A column whose
# name is a canonical variable's own name matches too, so a variable declared in config needs no entry.
SYNONYMS = {
    "pm25": ("pm25", "pm2", "pmfine", "finepm"), "pm10": ("pm10",), "no2": ("no2", "nitrogendioxide"),
    "o3": ("o3", "ozone"), "so2": ("so2", "sulphurdioxide", "sulfurdioxide"), "co": ("co", "carbonmonoxide"),
    "temp_c": ("temp", "temperature", "t", "t2m", "tair", "ta", "airtemp", "airtemperature"),
    "rh_pct": ("rh", "humidity", "humid", "hum", "relativehumidity"),
    "wind_speed_ms": ("ws", "wspd", "windspeed", "wsp", "wind"),
    "wind_dir_deg": ("wd", "wdir", "winddir", "winddirection"),
    "pressure_hpa": ("p", "pres", "press", "pressure", "psfc", "slp", "airpressure"),
    "precip_mm": ("rain", "precip", "prcp", "rainfall", "precipitation"),
    "aux": ("aux", "traffic", "trafficidx", "trafficindex"),
}
STATION_NAMES = ("station", "stationid", "stationcode", "site", "siteid", "sitecode", "sid", "code", "origin",
                 "location", "stn", "monitor", "id")
VALUE_NAMES = ("value", "val", "concentration", "measurement", "reading", "obs")
SENTINEL_CANDIDATES = (-9999.0, -999.9, -999.0, -888.0, -99.9, -99.0, 9999.0, 99999.0)


@dataclass
class Entry:
    """One proposed key with its value, confidence and a word on why."""
    value: object
    confidence: str
    why: str = ""


def name_key(name: str) -> str:
    return re.sub(r"[^a-z0-9]", "", str(name).lower())


def numbers_of(text: pd.Series, decimal: str) -> pd.Series:
    cleaned = text.astype(str).str.strip()
    if decimal != ".":
        cleaned = cleaned.str.replace(decimal, ".", regex=False)
    return pd.to_numeric(cleaned, errors="coerce")


def is_numeric(text: pd.Series, decimal: str) -> bool:
    filled = text.astype(str).str.strip() != ""
    return bool(filled.any()) and numbers_of(text[filled], decimal).notna().mean() >= 0.9


def unit_in_name(name: str) -> tuple[str, str | None]:
    """(name without a unit, the unit written in it): 'PM2.5 (ug/m3)' -> ('PM2.5', 'ug/m3'),
    'temp_F' -> ('temp', 'degF')."""
    bracket = re.search(r"\s*[\(\[]([^\)\]]+)[\)\]]\s*$", name)
    if bracket and normalise_unit(bracket.group(1)):
        return name[:bracket.start()], normalise_unit(bracket.group(1))
    head, sep, tail = name.rpartition("_")
    if sep and head and normalise_unit(tail) and tail.lower() not in ("1",):
        return head, normalise_unit(tail)
    return name, None


def match_variable(name: str) -> tuple[str | None, str]:
    """(canonical variable, confidence) for a column name or a code of a long dump."""
    bare, _ = unit_in_name(name)
    whole, last = name_key(bare), name_key(bare.rsplit(".", 1)[-1])
    for candidate, confidence in ((whole, "high"), (last, "medium")):
        for variable in BY_NAME:
            spellings = (name_key(variable), *SYNONYMS.get(variable, ()))
            if candidate in spellings:
                short = len(candidate) == 1  # "t" or "p" alone is likely but not certain
                return variable, "medium" if short else confidence
    return None, ""


def by_values(numbers: pd.Series) -> tuple[str | None, str]:
    """Variables whose values give them away: pressure (narrow, near 1000 hPa) and wind direction."""
    numbers = numbers.dropna()
    if numbers.empty:
        return None, ""
    low, high, median = numbers.quantile(0.01), numbers.quantile(0.99), numbers.median()
    if 850 <= low and high <= 1100 and high - low < 120:
        return "pressure_hpa", "values between 850 and 1100 with a narrow spread look like air pressure"
    if 0 <= numbers.min() and numbers.max() <= 360 and high - low > 250 and (numbers % 1 == 0).mean() > 0.9:
        return "wind_dir_deg", "whole numbers spread over 0..360 look like wind direction"
    return None, f"values {low:.4g} .. {high:.4g}, median {median:.4g}"


def guess_unit(variable: str, numbers: pd.Series) -> Entry:
    """The delivered unit of a variable from its values, when they can tell."""
    canonical = BY_NAME[variable].unit
    numbers = numbers.dropna()
    numbers = numbers[~numbers.isin(SENTINEL_CANDIDATES)]
    if numbers.empty:
        return Entry(canonical, "low", "no numbers to judge by")
    median, high, low = float(numbers.median()), float(numbers.quantile(0.99)), float(numbers.quantile(0.01))
    if variable == "temp_c":
        if low > 180:
            return Entry("K", "high", f"median {median:.1f}: kelvin")
        if high > 50 or median > 35:
            return Entry("degF", "medium", f"median {median:.1f}, 99th percentile {high:.1f}: too warm for degC")
        return Entry("degC", "medium", f"median {median:.1f}")
    if variable == "rh_pct":
        return Entry("fraction", "high", "values within 0..1") if high <= 1.0 else Entry("%", "high")
    if variable == "pressure_hpa":
        for unit, (lo, hi) in {"hPa": (800, 1100), "kPa": (80, 110), "inHg": (23, 33), "mmHg": (600, 800),
                               "Pa": (80000, 110000)}.items():
            if lo <= median <= hi:
                return Entry(unit, "high", f"median {median:.1f}")
    if variable in ("wind_dir_deg", "aux") or canonical == "ug/m3" and variable.startswith("pm"):
        return Entry(canonical, "high" if variable != "aux" else "medium")
    options = {"wind_speed_ms": "km/h, mph or knots", "precip_mm": "inch"}
    gas = getattr(BY_NAME[variable], "molar_mass_g_per_mol", None) is not None  # a mixing ratio fits too
    alternative = options.get(variable, ("ppm" if canonical == "mg/m3" else "ppb") if gas else "another unit")
    return Entry(canonical, "low", f"median {median:.4g}: {canonical} assumed, {alternative} fit the values too")


def find_sentinels(table: pd.DataFrame, columns: list[str], decimal: str) -> list:
    if not columns:
        return []
    values = pd.concat([numbers_of(table[c], decimal) for c in columns], ignore_index=True)
    return [int(v) if v % 1 == 0 else v for v in SENTINEL_CANDIDATES if (values == v).any()]


def station_column(table: pd.DataFrame, exclude: set, decimal: str) -> tuple[str | None, str]:
    text_columns = [c for c in table.columns if c not in exclude and not is_numeric(table[c], decimal)]
    for column in text_columns:
        if name_key(column) in STATION_NAMES:
            return column, "high"
    by_size = sorted(text_columns, key=lambda c: table[c].nunique())
    return (by_size[0], "medium") if by_size else (None, "")


def long_columns(table: pd.DataFrame, exclude: set, decimal: str) -> dict | None:
    """{variable_column, value_column[, unit_column]} when one column names a variable on each row."""
    text = [c for c in table.columns if c not in exclude and not is_numeric(table[c], decimal)]
    variable_column = None
    for column in text:
        codes = table[column].str.strip().unique()
        if len(codes) >= 2 and sum(match_variable(code)[0] is not None for code in codes) >= len(codes) / 2:
            variable_column = column
            break
    if variable_column is None:
        return None
    numeric = [c for c in table.columns if c not in exclude and is_numeric(table[c], decimal)]
    if not numeric:
        return None
    value_column = next((c for c in numeric if name_key(c) in VALUE_NAMES), numeric[0])
    found = {"variable_column": variable_column, "value_column": value_column}
    for column in text:
        if column != variable_column and table[column].map(lambda u: normalise_unit(u) is not None).mean() > 0.9:
            found["unit_column"] = column
    return found
