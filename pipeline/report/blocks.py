"""HTML building blocks of the report: a figure, a table, a number, a caption naming its selection rule.

Reads and writes nothing; used by pipeline.report.html and the report's section modules. A block built
from one selection rule carries `data-selection="<rule>"` and a caption with pipeline.selection.label, so
anything from target-peek reads "upper bound" (tests/test_report.py checks the page for it).
"""

from __future__ import annotations

import html

import numpy as np
import pandas as pd

from pipeline import selection
from pipeline.report import figures

E = html.escape


def figure(fig, dpi: int, caption: str, rule: str | None) -> str:
    data = figures.png_base64(fig, dpi)
    attr = f' data-selection="{E(rule)}"' if rule else ""
    return (f'<figure{attr}><img alt="{E(caption)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{E(caption)}</figcaption></figure>")


def table(frame: pd.DataFrame, caption: str, rule: str | None = None, classes: str = "",
          column_rules: dict[str, str] | None = None) -> str:
    """An HTML table; `column_rules` marks whole columns (header and cells) with the rule they come from."""
    attr = f' data-selection="{E(rule)}"' if rule else ""
    column_rules = column_rules or {}
    marks = [f' data-selection="{E(column_rules[col])}"' if col in column_rules else "" for col in frame.columns]
    head = "".join(f"<th{mark}>{E(str(col))}</th>" for col, mark in zip(frame.columns, marks))
    body = "".join("<tr>" + "".join(f"<td{mark}>{E(fmt(value))}</td>" for value, mark in zip(row, marks)) + "</tr>"
                   for row in frame.itertuples(index=False))
    return (f'<table class="{classes}"{attr}><caption>{E(caption)}</caption><thead><tr>{head}</tr></thead>'
            f"<tbody>{body}</tbody></table>")


def fmt(value) -> str:
    if isinstance(value, (float, np.floating)):
        if not np.isfinite(value):
            return "–"
        return f"{value:.4g}"
    return str(value)


def rule_caption(text: str, rule: str) -> str:
    return f"{text} — selection: {selection.label(rule)}"
