"""Shift diagnostics of the grid: city-to-city feature shift and how target error follows it.

Reads the clean Parquet tables (data/clean/<city>.parquet), the station table and a grid summary
(rows of pipeline.grid_stats.summarise); writes nothing itself (the `diagnose_shift` rule writes
results/shift.csv, the `shift` command prints). Config keys obeyed (passed in): forecast.exclude_features
(variables left out of the comparison, as they are left out of the model inputs).
The distances themselves come from pipeline.shift (energy distance, mean Wasserstein, centroid km).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from pipeline import shift as shift_stats
from pipeline.errors import InputError
from pipeline.stations import load_stations
from pipeline.variables import VARIABLE_NAMES

SHIFT_MEASURES = ("energy_distance", "mean_wasserstein")


def shift_variables(tables: dict[str, pd.DataFrame], exclude=()) -> list[str]:
    """Canonical variables present in every table and not excluded from the model inputs."""
    return [name for name in VARIABLE_NAMES
            if name not in set(exclude) and all(name in table.columns for table in tables.values())]


def read_clean(clean_paths: dict[str, Path | str]) -> dict[str, pd.DataFrame]:
    tables = {}
    for city, path in sorted(clean_paths.items()):
        if not Path(path).exists():
            raise InputError("clean table not found; run ingestion first", file=str(path))
        tables[city] = pd.read_parquet(path)
    return tables


def compute_shift(clean_paths: dict[str, Path | str], stations_path: Path | str, exclude=(),
                  max_n: int = 2000, seed: int = 0) -> pd.DataFrame:
    """Pairwise shift of every pair of cities (pipeline.shift.pairwise_shift) on standardised features."""
    tables = read_clean(clean_paths)
    if len(tables) < 2:  # nothing to compare: an empty table, shown as such in the report
        return pd.DataFrame(columns=list(shift_stats.SHIFT_COLUMNS))
    variables = shift_variables(tables, exclude)
    stations = load_stations(stations_path)
    return shift_stats.pairwise_shift(tables, variables, stations[stations["city"].isin(tables)],
                                      max_n=max_n, seed=seed)


def split_errors(summary: pd.DataFrame) -> pd.DataFrame:
    """One row per split: its target error averaged over the model+penalty combinations it holds."""
    table = summary.dropna(subset=["mean"])
    grouped = table.groupby(["split_id", "split", "sources", "target"], as_index=False)
    return grouped.agg(mean=("mean", "mean"), n_combos=("combo", "nunique")).assign(
        metric=summary["metric"].iloc[0])


def error_vs_shift(shift: pd.DataFrame, summary: pd.DataFrame,
                   measure: str = "energy_distance") -> tuple[pd.DataFrame, float, float]:
    """Per split: mean source-target shift and target error; Spearman (rho, p) between them.

    Splits whose target is also a source (within-city) have no city pair and are left out; the count
    is returned in the `excluded` attribute of the frame so the caller can report it.
    """
    errors = split_errors(summary)
    cross = errors[[target not in sources.split("+") for sources, target in zip(errors["sources"],
                                                                                  errors["target"])]]
    lookup = {frozenset((a, b)): value for a, b, value in zip(shift["city_a"], shift["city_b"], shift[measure])}
    values = [np.mean([lookup.get(frozenset((source, target)), np.nan) for source in sources.split("+")])
              for sources, target in zip(cross["sources"], cross["target"])]
    points = cross.assign(shift=values).dropna(subset=["shift"]).reset_index(drop=True)
    points.attrs["excluded"] = int(len(errors) - len(points))
    if len(points) < 3:
        return points, float("nan"), float("nan")
    rho, p_value = shift_stats.shift_vs_error(shift, points, shift_col=measure, error_col="mean")
    return points, rho, p_value
