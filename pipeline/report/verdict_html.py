"""The report's first section: what the grid shows, per model family, and against the scenario's ground truth.

Reads the headline rule's summary rows (grid.csv) and grid_meta.json as handed over by pipeline.report.html,
and the declared ground truth (`data.ground_truth`, handed over by the render_report rule); computes with
pipeline.verdict and returns HTML; writes nothing. The section carries data-selection with the rule, and
names the rule with pipeline.selection.label, so a target-peek verdict reads "upper bound".
"""

from __future__ import annotations

import pandas as pd
from markupsafe import Markup

from pipeline import grid_stats, verdict
from pipeline.report.templating import render

ITEMS = "<ul>{% for line in lines %}<li>{{ line }}</li>{% endfor %}</ul>"
GROUND_TRUTH = ("<h3>Against the scenario's ground truth</h3><p>Declared in the data config "
                "(<code>data.ground_truth</code>): {{ about }}. The penalty can help where the target's link breaks "
                "(its label is not one under which the link holds) and the sources disagree on the link, so the "
                "penalty sees it change between environments; everywhere else it cannot.</p>"
                "{% if lines %}" + ITEMS + "{% else %}<p>No penalised model with an ERM twin in the grid.</p>{% endif %}")
VERDICT = ('<section id="verdict"><h2>Verdict</h2><div data-selection="{{ rule }}">'
           "<p>Does the invariance penalty beat the same model trained with ERM on the same split? Metric: "
           "{{ label }} ({{ direction }}); selection: {{ rule|rule }}. {{ change_note }}; {{ tie_note }}; "
           "alpha = {{ '%g'|format(alpha) }}.</p>"
           "{% if lines %}" + ITEMS + "{% else %}<p>No penalised model with an ERM twin in the grid: nothing to judge."
           "</p>{% endif %}{{ ground_truth }}</div></section>")


def _ground_truth_part(summary: pd.DataFrame, ground_truth: dict | None, alpha: float) -> Markup:
    table = verdict.ground_truth_verdicts(summary, ground_truth, alpha)
    if table is None:
        return Markup()  # the scenario declares no ground truth: nothing to check against
    lines = []
    for row in table.to_dict("records"):
        where = "where it can help" if row["expectation"] == verdict.CAN else "where it cannot help"
        helped = row["significant_wins"] > 0 and row["significant_losses"] == 0
        answer = ("it helped" if helped else "it did not help") if row["expectation"] == verdict.CAN else \
            ("it nevertheless helped" if helped else "it did not help, as expected")
        lines.append(f"{verdict.sentence(row, where)} So {answer}. Splits: {row['splits']}.")
    return render(GROUND_TRUTH, about=str(ground_truth["about"]), lines=lines)


def verdict_section(summary: pd.DataFrame, meta: dict, rule: str, ground_truth: dict | None) -> Markup:
    """Per family x penalty: wins / ties / losses vs the ERM twin, median change, significant after Holm."""
    alpha = float(meta.get("alpha", grid_stats.ALPHA))
    metric = summary["metric"].iloc[0]
    return render(VERDICT, rule=rule, alpha=alpha, tie_note=verdict.TIE_NOTE,
                  label=summary["metric_label"].iloc[0] if "metric_label" in summary.columns else meta["metric"],
                  direction=grid_stats.direction_text(metric), change_note=grid_stats.change_note(metric),
                  lines=[verdict.sentence(row) for row in verdict.family_verdicts(summary, alpha).to_dict("records")],
                  ground_truth=_ground_truth_part(summary, ground_truth, alpha))
