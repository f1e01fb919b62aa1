"""The report's hyperparameter-search section: what was searched, which values the runs selected, and the
sensitivity of the target error to the penalty weight.

Reads the trial table (results/grid_trials.csv, pipeline.trial_table) and the grid's run table and meta as
handed over by pipeline.report.html; returns HTML, writes nothing. Config keys obeyed (passed in):
report.selection (the headline rule), report.figure_dpi. The section is left out when no run searched.

What it may show without a label: which trial each run's selection rule chose (that rule's own data). The
sensitivity view shows the target test error of every trial, i.e. target data across trials: a weight read
off it would be chosen with target data, so its figure, table and text are marked data-selection=
"target-peek" and carry pipeline.selection.UPPER_BOUND_LABEL, like every other target-peek block.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from markupsafe import Markup

from pipeline import grid_stats, names, selection, trial_table
from pipeline.report import figures
from pipeline.report.blocks import figure, rule_caption, table
from pipeline.report.templating import render

WEIGHT = "penalty.weight"
WEIGHT_COLUMN = f"{trial_table.VALUE_PREFIX}{WEIGHT}"


def _chosen_by(trials: pd.DataFrame, rule: str) -> pd.Series:
    return trials["selected_by"].fillna("").astype(str).str.split(";").apply(lambda rules: rule in rules)


def chosen_values(trials: pd.DataFrame, rule: str) -> pd.DataFrame:
    """Per model+penalty and searched value: its trials, and how many runs `rule` selected it in."""
    trials = trials.assign(chosen=_chosen_by(trials, rule))
    rows = []
    for key in trial_table.searched_keys(trials):
        column = f"{trial_table.VALUE_PREFIX}{key}"
        for (model, penalty, value), group in trials[trials[column].notna()].groupby(["model", "penalty", column],
                                                                                    sort=True):
            rows.append({"model+penalty": grid_stats.combo_label(model, penalty), "searched key": key, "value": value,
                         "trials": len(group), f"runs that selected it ({selection.label(rule)})":
                             int(group["chosen"].sum())})
    return pd.DataFrame(rows)


def sensitivity(trials: pd.DataFrame, column: str, rule: str) -> pd.DataFrame:
    """Mean target metric (`column`) of the trials per model, penalty and penalty weight, over splits and seeds."""
    rows = trials[trials[WEIGHT_COLUMN].notna()].assign(chosen=_chosen_by(trials, rule))
    grouped = rows.groupby(["model", "penalty", WEIGHT_COLUMN], sort=True)
    return pd.DataFrame({"mean": grouped[column].mean(), "trials": grouped.size(),
                         "chosen": grouped["chosen"].sum().astype(int)}).reset_index().rename(
        columns={WEIGHT_COLUMN: "weight"})


SECTION = ('<section id="search"><h2>Hyperparameter search</h2>'
           "<p>Budget: {{ '%.0f'|format(budget) }} trials per run (split x model x penalty x seed), the same for every "
           "method, ERM included; {{ n_runs }} runs searched ({{ n_trials }} trials, MLflow child runs of each run); "
           "runs with nothing to search ran once. Each selection rule picks the trial with its own validation score "
           "({{ rules }}), and every number of the grid under a rule comes from the trial that rule picked. The "
           "searched values are part of each trial's identity: a larger budget trains only the new trials.</p>"
           "{{ chosen }}{% if sensitivity %}<h3>Penalty-weight sensitivity</h3>"
           '<p data-selection="{{ peek }}">The target test error of every trial against its penalty weight (mean over '
           "splits and seeds; checkpoints chosen by {{ rule|rule }}). This view uses target data: a weight read off "
           "it is chosen with target data, i.e. {{ peek|rule }}. The grid's runs chose their weights with their own "
           "rule; the table counts how often each was chosen.</p>{{ sensitivity }}{% endif %}</section>")


def search_section(trials: pd.DataFrame, runs: pd.DataFrame, meta: dict, rule: str, dpi: int) -> Markup:
    if trials is None or trials.empty:
        return Markup()
    column = grid_stats.metric_column(runs.columns, meta["metric"], rule)
    label = meta.get("metric_label", meta["metric"])
    budget = pd.to_numeric(runs.get("tag.search.budget", pd.Series(dtype=float)), errors="coerce").max()
    rules = "; ".join(f"{selection.label(r)}: {text}" for r, text in (
        (selection.HOLDOUT, "the source validation risk"), (selection.ROTATION, "the rotation curve averaged over "
                                                             "the left-out source groups"),
        (selection.PEEK, "the target validation risk")) if r in meta["rules"])
    chosen = table(chosen_values(trials, rule), rule_caption("Searched values and the runs that selected each", rule),
                   rule)
    shown = Markup()
    if WEIGHT_COLUMN in trials.columns and trials[WEIGHT_COLUMN].notna().any():
        points = sensitivity(trials, column, rule)
        erm = runs[runs["penalty"] == names.ERM].groupby("model")[column].mean()
        reference = {model: float(erm.get(model, np.nan)) for model in points["model"].unique()}
        rows = pd.DataFrame({"model": points["model"], "penalty": points["penalty"].map(names.penalty_shown),
                             "penalty weight": points["weight"],
                             f"mean {label}, target test block": points["mean"], "trials": points["trials"],
                             f"runs that selected it ({selection.label(rule)})": points["chosen"],
                             "ERM of the model (its selected trials)": points["model"].map(reference)})
        caption = f"Penalty-weight sensitivity of {label} — uses target data: {selection.UPPER_BOUND_LABEL}"
        shown = (figure(figures.weight_sensitivity(points, reference, label, rule), dpi, caption, selection.PEEK)
                 + table(rows, caption, selection.PEEK))
    return render(SECTION, budget=budget, n_runs=trials["parent_run_id"].nunique(), n_trials=len(trials), rules=rules,
                  chosen=chosen, sensitivity=shown, rule=rule, peek=selection.PEEK)
