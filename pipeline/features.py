"""Model input features from clean station series, and the per-feature scaler.

Reads: in-memory station frames (canonical variable columns of a clean table, hourly, UTC); writes
nothing. Config keys obeyed (passed in by pipeline.windows): `forecast.calendar`,
`forecast.exclude_features`, `forecast.target`.

Feature order: the canonical variables in pipeline.variables order (minus excluded / not delivered
ones), with `wind_dir_deg` replaced in place by `wind_dir_sin`, `wind_dir_cos`: a direction in degrees
puts 359 and 1 far apart although they are neighbours, sin/cos on the unit circle keeps them close
(common practice). Then, when calendar is on, hour of day, day of week and day of year as sin/cos pairs,
all computed in UTC: every station shares one clock, so the features need no time-zone table; a city's
local daily cycle then appears at a city-specific UTC hour, which is part of the shift being studied.
The target variable keeps its canonical name.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.errors import InputError
from pipeline.variables import VARIABLE_NAMES

WIND_DIRECTION = "wind_dir_deg"
WIND_DIRECTION_FEATURES = ("wind_dir_sin", "wind_dir_cos")
CALENDAR_FEATURES = ("hour_sin", "hour_cos", "dow_sin", "dow_cos", "doy_sin", "doy_cos")


def feature_names(variables: list[str], calendar: bool) -> list[str]:
    """Names of the feature axis for the given kept variables (see the module docstring for order)."""
    names: list[str] = []
    for variable in variables:
        names.extend(WIND_DIRECTION_FEATURES if variable == WIND_DIRECTION else (variable,))
    return names + (list(CALENDAR_FEATURES) if calendar else [])


def derive_features(values: pd.DataFrame, variables: list[str], calendar: bool) -> np.ndarray:
    """(T, F) float64 matrix for one station: `values` has the variables as columns and a UTC hourly
    DatetimeIndex. NaN stays NaN (wind sin/cos are NaN where the direction is)."""
    columns: list[np.ndarray] = []
    for variable in variables:
        column = values[variable].to_numpy(dtype=np.float64)
        if variable == WIND_DIRECTION:
            radians = np.radians(column)
            columns += [np.sin(radians), np.cos(radians)]
        else:
            columns.append(column)
    if calendar:
        index = values.index
        days_in_year = np.where(index.is_leap_year, 366.0, 365.0)
        for angle in (2 * np.pi * index.hour.to_numpy() / 24.0,
                      2 * np.pi * index.day_of_week.to_numpy() / 7.0,
                      2 * np.pi * (index.day_of_year.to_numpy() - 1) / days_in_year):
            columns += [np.sin(angle), np.cos(angle)]
    if not columns:
        return np.empty((len(values), 0))
    return np.column_stack(columns).astype(np.float64)


def candidate_variables(target: str, exclude: list[str]) -> list[str]:
    """Canonical variables minus the excluded ones; checks the names."""
    if target not in VARIABLE_NAMES:
        raise InputError(f"unknown variable {target!r} (known: {', '.join(VARIABLE_NAMES)})",
                         field="forecast.target")
    for name in exclude:
        if name not in VARIABLE_NAMES:
            raise InputError(f"unknown variable {name!r}", field="forecast.exclude_features")
    if target in exclude:
        raise InputError(f"the target {target!r} cannot be excluded", field="forecast.exclude_features")
    return [v for v in VARIABLE_NAMES if v not in exclude]


class FeatureScaler:
    """Per-feature standardisation (x - mean) / std by scikit-learn's StandardScaler, addressed by name.

    StandardScaler ignores NaN when fitting, uses the population std and gives a constant feature (e.g. a
    station that reports the same pressure all period) the scale 1, so nothing divides by zero. This
    wrapper adds what the windows need: feature names, and scaling one named feature (the target).
    `fit` learns `mean_`, `std_` (float64) and `feature_names_`, and returns self.
    """

    def fit(self, rows: np.ndarray, names: list[str]) -> "FeatureScaler":
        from sklearn.preprocessing import StandardScaler

        rows = np.asarray(rows, dtype=np.float64)
        if rows.ndim != 2 or rows.shape[1] != len(names):
            raise ValueError(f"rows of shape {rows.shape} do not match {len(names)} feature names")
        observed = np.isfinite(rows).sum(axis=0)
        empty = [n for n, count in zip(names, observed) if count == 0]
        if empty:
            raise InputError(f"no value to fit the scaler on for {empty}", field="features")
        fitted = StandardScaler().fit(rows)
        self.mean_, self.std_ = fitted.mean_, fitted.scale_
        self.feature_names_ = list(names)
        return self

    def transform(self, rows: np.ndarray) -> np.ndarray:
        return (np.asarray(rows, dtype=np.float64) - self.mean_) / self.std_

    def scale(self, values: np.ndarray, feature: str) -> np.ndarray:
        i = self.feature_names_.index(feature)
        return (np.asarray(values, dtype=np.float64) - self.mean_[i]) / self.std_[i]

    def unscale(self, values: np.ndarray, feature: str) -> np.ndarray:
        i = self.feature_names_.index(feature)
        return np.asarray(values, dtype=np.float64) * self.std_[i] + self.mean_[i]
