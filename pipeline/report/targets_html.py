"""The report of a sweep over several forecast variables (`target=pm25,no2`): one part per variable.

Reads and writes nothing: pipeline.report.html hands over the grid tables and renders the page. Each
variable's part holds its own verdict, grid, search, ranks, horizon curves and shift relation, in its own
unit (pipeline.target_sections); setup and provenance are shared. Element ids inside a part end in the
variable, so every anchor of the page stays unique. A single-target grid gives one view and no part.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import pandas as pd
from markupsafe import Markup

from pipeline import grid_stats, target_sections
from pipeline.report.templating import render

PART = ('<section id="target-{{ variable }}" class="target"><h2>Forecast target {{ variable }} ({{ unit }})</h2>'
        "{{ body }}</section>")
_ID = re.compile(r'\bid="([^"]+)"')


@dataclass
class TargetView:
    """What the result sections of one forecast variable read."""
    variable: str | None  # None: the grid has one forecast variable
    runs: pd.DataFrame
    summary_all: pd.DataFrame
    meta: dict
    trials: pd.DataFrame | None


def _without_column(table: pd.DataFrame | None) -> pd.DataFrame | None:
    return None if table is None else table.drop(columns=target_sections.TARGET_COLUMN, errors="ignore")


def views(runs: pd.DataFrame, summary_all: pd.DataFrame, meta: dict, trials: pd.DataFrame | None) -> list[TargetView]:
    """One view per forecast variable (its runs, summary, metric label and Friedman results)."""
    out = []
    for variable, part in target_sections.run_sections(runs):
        view_meta = meta if variable is None else {**meta, **meta["targets"][variable]}
        out.append(TargetView(variable, part, _without_column(target_sections.part_of(summary_all, variable)),
                              view_meta, _without_column(target_sections.part_of(trials, variable))))
    return out


def part(variable: str, sections: list[Markup]) -> Markup:
    """One variable's sections under its heading, their ids suffixed with the variable."""
    body = _ID.sub(lambda match: f'id="{match.group(1)}-{variable}"', str(Markup("").join(sections)))
    return render(PART, variable=variable, unit=grid_stats.unit_of(variable), body=Markup(body))
