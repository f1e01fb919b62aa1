"""HTML building blocks of the report: a figure, a table, a number, a caption naming its selection rule.

Reads and writes nothing; used by pipeline.report.html and the report's section modules. A block built
from one selection rule carries `data-selection="<rule>"` and a caption with pipeline.selection.label, so
anything from target-peek reads "upper bound" (tests/test_report.py checks the page for it).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from markupsafe import Markup

from pipeline import selection
from pipeline.report import figures
from pipeline.report.templating import render

# `rule` marks a block with the selection rule it shows (data-selection); None: not one rule's numbers.
FIGURE = ('<figure{% if rule %} data-selection="{{ rule }}"{% endif %}>'
          '<img alt="{{ caption }}" src="data:image/png;base64,{{ data }}"><figcaption>{{ caption }}</figcaption>'
          '</figure>')
# `marks` holds, per column, the rule that whole column comes from (header and cells), or None.
TABLE = ('<table class="{{ classes }}"{% if rule %} data-selection="{{ rule }}"{% endif %}>'
         '<caption>{{ caption }}</caption><thead><tr>'
         '{% for column, mark in header %}<th{% if mark %} data-selection="{{ mark }}"{% endif %}>{{ column }}</th>'
         '{% endfor %}</tr></thead><tbody>'
         '{% for row in rows %}<tr>{% for value, mark in row %}'
         '<td{% if mark %} data-selection="{{ mark }}"{% endif %}>{{ value }}</td>{% endfor %}</tr>{% endfor %}'
         '</tbody></table>')


def figure(fig, dpi: int, caption: str, rule: str | None) -> Markup:
    return render(FIGURE, rule=rule, caption=caption, data=figures.png_base64(fig, dpi))


def table(frame: pd.DataFrame, caption: str, rule: str | None = None, classes: str = "",
          column_rules: dict[str, str] | None = None) -> Markup:
    """An HTML table; `column_rules` marks whole columns (header and cells) with the rule they come from."""
    marks = [(column_rules or {}).get(col) for col in frame.columns]
    rows = [list(zip(map(fmt, row), marks)) for row in frame.itertuples(index=False)]
    return render(TABLE, classes=classes, rule=rule, caption=caption, header=list(zip(map(str, frame.columns), marks)),
                  rows=rows)


def fmt(value) -> str:
    if isinstance(value, (float, np.floating)):
        if not np.isfinite(value):
            return "–"
        return f"{value:.4g}"
    return str(value)


def rule_caption(text: str, rule: str) -> str:
    return f"{text} — selection: {selection.label(rule)}"
