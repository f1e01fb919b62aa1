"""Several forecast targets (`target=pm25,no2`): the grid is one section per forecast variable.

Reads and writes nothing. Runs of different forecast variables are never compared with each other: each
variable has its own ranks, tests, intervals and units. The variable of a run is its logged param
`forecast.target`; the tables written by the aggregation carry it in TARGET_COLUMN when there are several
(a single-target grid keeps today's columns).
"""

from __future__ import annotations

import pandas as pd

TARGET_COLUMN = "target_variable"
TARGET_PARAM = "param.forecast.target"


def run_sections(runs: pd.DataFrame) -> list[tuple[str | None, pd.DataFrame]]:
    """[(variable, its runs)] in name order; [(None, runs)] when the runs share one variable."""
    variables = sorted(runs[TARGET_PARAM].dropna().unique()) if TARGET_PARAM in runs.columns else []
    if len(variables) <= 1:
        return [(None, runs)]
    return [(str(v), runs[runs[TARGET_PARAM] == v]) for v in variables]


def table_sections(table: pd.DataFrame | None) -> list[tuple[str | None, pd.DataFrame | None]]:
    """The same split of a table the aggregation wrote (grid.csv, grid_dm.csv, ...)."""
    if table is None or TARGET_COLUMN not in table.columns:
        return [(None, table)]
    return [(str(v), table[table[TARGET_COLUMN] == v]) for v in sorted(table[TARGET_COLUMN].unique())]


def part_of(table: pd.DataFrame | None, variable: str | None) -> pd.DataFrame | None:
    """The rows of one variable's section (all rows for a single-target table)."""
    if table is None or variable is None or TARGET_COLUMN not in table.columns:
        return table
    return table[table[TARGET_COLUMN] == variable]


def labelled(table: pd.DataFrame, variable: str | None) -> pd.DataFrame:
    """`table` with its section's variable in TARGET_COLUMN (first column); unchanged for a single target."""
    if variable is None:
        return table
    return table.assign(**{TARGET_COLUMN: variable})[[TARGET_COLUMN, *table.columns]]
