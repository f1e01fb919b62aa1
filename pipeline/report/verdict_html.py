"""The report's first section: what the grid shows, per model family, and against the scenario's ground truth.

Reads the headline rule's summary rows (grid.csv) and grid_meta.json as handed over by pipeline.report.html,
and the declared ground truth (`data.ground_truth`, handed over by the render_report rule); computes with
pipeline.verdict and returns HTML; writes nothing. The section carries data-selection with the rule, and
names the rule with pipeline.selection.label, so a target-peek verdict reads "upper bound".
"""

from __future__ import annotations

import html

import pandas as pd

from pipeline import grid_stats, selection, verdict

E = html.escape


def _items(lines: list[str]) -> str:
    return "<ul>" + "".join(f"<li>{E(line)}</li>" for line in lines) + "</ul>"


def _ground_truth_part(summary: pd.DataFrame, ground_truth: dict | None, alpha: float) -> str:
    table = verdict.ground_truth_verdicts(summary, ground_truth, alpha)
    if table is None:
        return ""  # the scenario declares no ground truth: nothing to check against
    parts = [f"<h3>Against the scenario's ground truth</h3><p>Declared in the data config "
             f"(<code>data.ground_truth</code>): {E(str(ground_truth['about']))}. The penalty can help where the "
             "target's link breaks (its label is not one under which the link holds) and the sources disagree on "
             "the link, so the penalty sees it change between environments; everywhere else it cannot.</p>"]
    if table.empty:
        return "".join(parts) + "<p>No penalised model with an ERM twin in the grid.</p>"
    lines = []
    for row in table.to_dict("records"):
        where = "where it can help" if row["expectation"] == verdict.CAN else "where it cannot help"
        helped = row["significant_wins"] > 0 and row["significant_losses"] == 0
        answer = ("it helped" if helped else "it did not help") if row["expectation"] == verdict.CAN else \
            ("it nevertheless helped" if helped else "it did not help, as expected")
        lines.append(f"{verdict.sentence(row, where)} So {answer}. Splits: {row['splits']}.")
    return "".join(parts) + _items(lines)


def verdict_section(summary: pd.DataFrame, meta: dict, rule: str, ground_truth: dict | None) -> str:
    """Per family x penalty: wins / ties / losses vs the ERM twin, median change, significant after Holm."""
    alpha = float(meta.get("alpha", grid_stats.ALPHA))
    label = summary["metric_label"].iloc[0] if "metric_label" in summary.columns else meta["metric"]
    families = verdict.family_verdicts(summary, alpha)
    parts = ['<section id="verdict"><h2>Verdict</h2>', f'<div data-selection="{E(rule)}">',
             f"<p>Does the invariance penalty beat the same model trained with ERM on the same split? Metric: "
             f"{E(label)} ({E(grid_stats.direction_text(summary['metric'].iloc[0]))}); selection: "
             f"{E(selection.label(rule))}. {E(grid_stats.change_note(summary['metric'].iloc[0]))}; "
             f"{E(verdict.TIE_NOTE)}; alpha = {alpha:g}.</p>"]
    if families.empty:
        parts.append("<p>No penalised model with an ERM twin in the grid: nothing to judge.</p>")
    else:
        parts.append(_items([verdict.sentence(row) for row in families.to_dict("records")]))
    parts.append(_ground_truth_part(summary, ground_truth, alpha))
    return "".join(parts) + "</div></section>"
