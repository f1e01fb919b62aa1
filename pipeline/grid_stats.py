"""Statistics of the comparison grid, computed from the one-row-per-run table (results/grid.parquet).

Pure pandas/numpy functions on tables handed over by pipeline.aggregate (the I/O shell); nothing is
read or written here. Config keys obeyed (passed in by the caller): report.metric, report.selection.
The tests themselves (Diebold-Mariano + HLN, Holm, Friedman, Iman-Davenport, Nemenyi CD, win/tie/loss,
relative change) live in pipeline.stats, the intervals in pipeline.resampling and the per-origin
statistics in pipeline.window_stats; this module arranges the grid and names what it shows.

Sign convention of "change vs ERM" (one everywhere: grid.csv, `shiftgrid grid`, the report's table and
heatmap): (penalty - ERM) / |ERM| of the cell means in the metric's own direction, so NEGATIVE = the
penalty lowered the metric, which is better for an error (mae, mse, ...) and worse for pod/csi/ets.

Orientation: errors (mae, rmse, mse, mase, far, ...) are better when smaller; pod, csi and ets when
larger; bias is best at 1. Ranks and win/tie/loss use an oriented *loss* (smaller = better) so one code
path serves every metric; reported means and relative changes stay in the metric's own direction.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from pipeline import resampling, selection, stats
from pipeline.window_stats import loss_for
from pipeline.errors import InputError
from pipeline.metrics import EXCEEDANCE_SCORES
from pipeline.names import ERM, NOT_APPLICABLE, penalty_shown
from pipeline.step_words import step_words
from pipeline.variables import BY_NAME

HIGHER_IS_BETTER = frozenset({"pod", "csi", "ets"})
BEST_AT_ONE = frozenset({"bias"})
# sampling and environment last: combo_label and split_label index the first six. A penalty is compared
# with the ERM run of the same split, model AND sampling (pipeline.twins): other batches, other protocol.
ID_COLUMNS = ("split_id", "sources", "target", "model", "family", "penalty", "sampling", "environment")
PROTOCOL_DEFAULTS = {"sampling": "balanced", "environment": ""}  # run tables from before the columns existed
ALPHA = 0.05  # level of every test, family-wise after the Holm correction
MULTIPLE_COMPARISON_CAVEAT = (
    "Diebold-Mariano p-values are Holm-adjusted over every penalised-vs-ERM-twin comparison of the grid under "
    "one selection rule. The Friedman blocks are target cities (splits that share a target are averaged "
    "first, since they are scored on the same target test data); blocks still share source cities in "
    "training, so they are not fully independent. The Nemenyi critical difference is read only when the "
    "omnibus test (Iman-Davenport F) rejects.")
CHANGE_NOTE = ("change vs ERM twin = (penalty - ERM) / |ERM| of the cell means, in %; negative = the penalty "
               "lowered the metric")


def combo_label(model: str, penalty: str) -> str:
    return f"{model}+{penalty_shown(penalty)}"


def split_label(sources, target: str) -> str:
    names = sources.split("+") if isinstance(sources, str) else list(sources)
    return f"{'+'.join(names)} → {target}"


def metric_base(metric_name: str) -> str:
    """'target_csi' -> 'csi', 'target_mae_h03' -> 'mae': the score whose direction matters."""
    name = metric_name.split(".", 1)[-1]
    for prefix in ("target_", "source_", "gap_", "worst_source_env_"):
        if name.startswith(prefix):
            name = name[len(prefix):]
    return name.split("_h")[0]


def higher_is_better(metric_name: str) -> bool:
    return metric_base(metric_name) in HIGHER_IS_BETTER


def direction_text(metric_name: str) -> str:
    base = metric_base(metric_name)
    if base in BEST_AT_ONE:
        return "best at 1"
    return "higher is better" if base in HIGHER_IS_BETTER else "lower is better"


def as_loss(values, metric_name: str) -> np.ndarray:
    """Values turned into a loss (smaller = better) for ranking and tallies."""
    arr = np.asarray(values, dtype=np.float64)
    base = metric_base(metric_name)
    if base in BEST_AT_ONE:
        return np.abs(arr - 1.0)
    return -arr if base in HIGHER_IS_BETTER else arr


def metric_column(columns, metric: str, rule: str) -> str:
    """The run-table column holding `metric` under selection `rule` (e.g. mae -> source-holdout.target_mae).

    Accepts a short target score name (mae, csi), a full metric name (target_mae_h03, source_mae) or a
    rule-free metric (fit_seconds). An unknown name is an InputError listing what was logged.
    """
    columns = list(columns)
    for candidate in (f"{rule}.{metric}", f"{rule}.target_{metric}"):
        if candidate in columns:
            return candidate
    ruled = any(col.endswith(f".{metric}") or col.endswith(f".target_{metric}") for col in columns)
    if metric in columns and not ruled:
        return metric
    available = sorted({col.split(".", 1)[1] for col in columns if col.split(".", 1)[0] in selection.RULES})
    if not any(col.startswith(f"{rule}.") for col in columns):
        raise InputError(f"no run logged metrics under selection rule {rule!r}", field="report.selection")
    raise InputError(f"metric {metric!r} was not logged under {rule!r}; available: "
                     f"{', '.join(available[:25])}{' ...' if len(available) > 25 else ''}",
                     field="report.metric")


def available_rules(runs: pd.DataFrame) -> list[str]:
    """Selection rules with at least one logged value in the run table, in the canonical order."""
    return [rule for rule in selection.RULES
            if any(col.startswith(f"{rule}.") and runs[col].notna().any() for col in runs.columns)]


THRESHOLD_SCORES = frozenset(EXCEEDANCE_SCORES)
_PLACES = (("source_", " on the source test block"), ("gap_", ", target minus source"),
           ("worst_source_env_", " in the worst source environment"), ("target_", ""))


def unit_of(variable: str) -> str:
    if variable not in BY_NAME:
        raise InputError(f"unknown forecast variable {variable!r}", field="forecast.target")
    return BY_NAME[variable].unit


def threshold_note(variable: str, threshold: float, step_hours: float = 1.0) -> str:
    """How the exceedance event is named everywhere: a research scoring threshold on the values of the
    study's cadence (hourly, daily, ...)."""
    step = step_words(step_hours)
    # A daily value spans the day a 24-h reference level is about; a finer one is never averaged here.
    averaging = "each covers one UTC day" if step.is_day else "no 24-h mean is formed"
    return (f"research scoring threshold: {step.adjective} {variable} above {float(threshold):g} "
            f"{unit_of(variable)}, applied to each {step.adjective} value ({averaging}; not an alert level)")


def metric_label(metric_name: str, variable: str, threshold: float | None = None, step_hours: float = 1.0) -> str:
    """'target_mae' -> 'MAE of pm25, ug/m3': the score, the forecast variable and its unit.

    mse carries the squared unit, mase none (each station's error is divided by its own naive error in
    the same unit), exceedance scores name their event on the study's cadence, a horizon metric
    (target_mae_h03) its step in the cadence's unit ("at hour 3 ahead", "at day 3 ahead").
    """
    name = metric_name.split(".", 1)[-1]
    place = next((text for prefix, text in _PLACES if name.startswith(prefix)), "")
    base = metric_base(name)
    step = step_words(step_hours)
    if "_h" in name.split(base, 1)[-1]:  # the logged key keeps its "_h": h stands for horizon step
        place += f" at {step.noun} {int(name.rsplit('_h', 1)[1])} ahead"
    unit = unit_of(variable)
    if base in THRESHOLD_SCORES:
        event = f"{step.adjective} {variable}" + (f" > {float(threshold):g} {unit}" if threshold is not None else "")
        return f"{base.upper()} of {event}{place} (no unit; research scoring threshold)"
    if base == "mase":
        return f"MASE of {variable}{place} (no unit: per-station seasonal-naive scale)"
    if base == "mse":
        return f"MSE of {variable}{place}, ({unit})^2"
    if base in ("mae", "rmse"):
        return f"{base.upper()} of {variable}{place}, {unit}"
    return name


def run_setting(runs: pd.DataFrame, param: str, field: str):
    """The one value of a logged param shared by every run (e.g. forecast.target); error if absent or mixed."""
    column = f"param.{param}"
    values = runs[column].dropna().unique() if column in runs.columns else []
    if len(values) != 1:
        raise InputError(f"the runs must share one {param}, found {list(values)}", file="grid.parquet", field=field)
    return values[0]


HORIZON_METRIC = re.compile(r"target_mae_h(\d+)")  # one per horizon step, un-prefixed (pipeline.metrics)
HORIZON_PARAM = "forecast.horizon_hours"


def run_step_hours(runs: pd.DataFrame) -> float:
    """The runs' time step in hours, for labels: the shared `forecast.horizon_hours` is cut into whole steps
    of the cadence (pipeline.windows) and each step logs its target_mae_hNN, so step = horizon / last NN.
    Hourly when the table lacks either (run tables from before the cadence existed were hourly)."""
    steps = [int(found.group(1)) for column in runs.columns if (found := HORIZON_METRIC.fullmatch(column))]
    if not steps or f"param.{HORIZON_PARAM}" not in runs.columns:
        return 1.0
    return float(run_setting(runs, HORIZON_PARAM, HORIZON_PARAM)) / max(steps)


def grid_metric_label(runs: pd.DataFrame, metric_name: str) -> str:
    """metric_label with the forecast variable, the threshold and the cadence read from the runs."""
    variable = str(run_setting(runs, "forecast.target", "forecast.target"))
    threshold = None
    if metric_base(metric_name) in THRESHOLD_SCORES:
        threshold = float(run_setting(runs, "metrics.hourly_exceedance_threshold",
                                      "metrics.hourly_exceedance_threshold"))
    return metric_label(metric_name, variable, threshold, run_step_hours(runs))


def change_note(metric_name: str) -> str:
    better = "better" if not higher_is_better(metric_name) else "worse"
    return f"{CHANGE_NOTE} ({better} for {metric_base(metric_name)})"


def format_change(change) -> str:
    """The one text form of a change vs ERM (heatmap annotation, report table, `shiftgrid grid`)."""
    return f"{float(change) * 100:+.1f}%" if np.isfinite(change) else "–"


def summarise(runs: pd.DataFrame, metric: str, rule: str) -> pd.DataFrame:
    """One row per split x model x penalty: mean, std, n_seeds, seed spread, ranks, change vs ERM.

    Runs whose metric is NaN are not averaged but counted in `n_missing`. seed_low / seed_high /
    seed_interval: pipeline.resampling.seed_interval (the seed range below 3 seeds). The 95 % interval
    over test origins (ci_*) needs the predictions artifacts and is joined in by `attach_tests`.
    rank = rank of the mean within its split (1 = best; ties averaged); mean_rank = average of a
    combination's ranks over the splits. vs_erm_*: the penalty against the ERM run of the same split,
    model and sampling (relative change of the mean, see the module docstring) and, per model x penalty,
    win/tie/loss over splits (tie: within stats.TIE_TOLERANCE of the ERM mean).
    """
    column = metric_column(runs.columns, metric, rule)
    runs = runs.assign(**{c: runs[c] if c in runs else v for c, v in PROTOCOL_DEFAULTS.items()})
    rows = []
    # positions per group rather than group frames: thousands of small frames cost more than the statistics
    grouped = runs.groupby(list(ID_COLUMNS), sort=True, dropna=False)
    codes = grouped.ngroup().to_numpy()
    order = np.argsort(codes, kind="stable")  # each group's rows in table order
    ends = np.cumsum(np.bincount(codes, minlength=grouped.ngroups))
    metric_values = runs[column].to_numpy(np.float64)
    seeds, run_ids = runs["seed"].to_numpy(), runs["run_id"].astype(str).to_numpy()
    for key, end, size in zip(grouped.size().index, ends, np.diff(ends, prepend=0)):
        positions = order[end - size:end]
        values = metric_values[positions]
        finite = values[np.isfinite(values)]
        low, high, kind = resampling.seed_interval(finite)
        rows.append({**dict(zip(ID_COLUMNS, key)),
                     "combo": combo_label(key[3], key[5]), "split": split_label(key[1], key[2]),
                     "selection_rule": rule, "selection_label": selection.label(rule),
                     "metric": column.split(".", 1)[-1], "direction": direction_text(column),
                     "mean": float(finite.mean()) if finite.size else np.nan,
                     "std": float(finite.std(ddof=1)) if finite.size > 1 else np.nan,
                     "n_seeds": int(finite.size), "n_missing": int(values.size - finite.size),
                     "seed_low": low, "seed_high": high, "seed_interval": kind,
                     "run_ids": ";".join(run_ids[positions[np.argsort(seeds[positions], kind="stable")]])})
    summary = pd.DataFrame(rows)
    if summary.empty:
        raise InputError("no runs to summarise", field="runs")
    summary["metric_label"] = grid_metric_label(runs, column)
    summary["loss"] = as_loss(summary["mean"], column)
    summary["rank"] = stats.rank_within(summary, ["split_id"], "loss")
    summary["mean_rank"] = summary.groupby("combo")["rank"].transform("mean")
    summary["best_in_split"] = summary["rank"] == summary.groupby("split_id")["rank"].transform("min")
    return _add_erm_comparison(summary, column).drop(columns="loss")


def _add_erm_comparison(summary: pd.DataFrame, column: str) -> pd.DataFrame:
    erm = summary[summary["penalty"] == ERM]
    erm_mean = dict(zip(zip(erm["split_id"], erm["model"], erm["sampling"]), erm["mean"]))  # one ERM cell per key
    summary = summary.copy()
    for name in ("vs_erm_change", "vs_erm_outcome", "vs_erm_wins", "vs_erm_ties", "vs_erm_losses", "vs_erm_missing"):
        summary[name] = np.nan
    penalised = ~summary["penalty"].isin([ERM, NOT_APPLICABLE])
    for (model, penalty), group in summary[penalised].groupby(["model", "penalty"]):
        base_mean = np.array([erm_mean.get((split, model, sampling), np.nan)
                              for split, sampling in zip(group["split_id"], group["sampling"])], dtype=np.float64)
        summary.loc[group.index, "vs_erm_change"] = stats.relative_change(group["mean"].to_numpy(), base_mean)
        codes = stats.outcome_codes(as_loss(group["mean"], column), as_loss(base_mean, column))
        summary.loc[group.index, "vs_erm_outcome"] = codes  # -1 win, 0 tie, 1 loss, 2 no twin
        tally = stats.win_tie_loss(as_loss(group["mean"], column), as_loss(base_mean, column))
        for outcome in ("wins", "ties", "losses", "missing"):
            summary.loc[group.index, f"vs_erm_{outcome}"] = tally[outcome]
    return summary


def attach_tests(summary: pd.DataFrame, dm: pd.DataFrame | None, intervals: pd.DataFrame | None) -> pd.DataFrame:
    """Join the Diebold-Mariano row whose loss matches the summary's metric and its origin intervals.

    dm: pipeline.window_stats.paired_dm rows with split_id, model, penalty, selection_rule, dm_loss and
    dm_p_holm; intervals: cell_interval rows with a `metric` base column. Cells without either keep NaN.
    """
    keys = ["split_id", "model", "penalty", "selection_rule"]
    base = metric_base(summary["metric"].iloc[0])
    out = summary.drop(columns=[c for c in summary.columns if c.startswith(("dm_", "ci_"))])
    if dm is not None and len(dm):
        out = out.merge(dm[dm["dm_loss"] == loss_for(base)], on=keys, how="left")
    if intervals is not None and len(intervals):
        chosen = intervals[intervals["metric"] == base].drop(columns=["metric", "point"], errors="ignore")
        out = out.merge(chosen, on=keys, how="left")
    for column in ("dm_p", "dm_p_holm", "dm_mean_diff", "dm_loss", "ci_low", "ci_high", "ci_block"):
        if column not in out.columns:
            out[column] = np.nan
    return out


def gain_vs_erm(summary: pd.DataFrame) -> np.ndarray:
    """Change turned so that positive = better than ERM, whatever the metric's direction (colour only)."""
    sign = np.where([higher_is_better(m) for m in summary["metric"]], 1.0, -1.0)
    return sign * summary["vs_erm_change"].to_numpy(np.float64)


def friedman_over_targets(summary: pd.DataFrame, alpha: float = ALPHA) -> dict:
    """Friedman + Iman-Davenport + Nemenyi CD over model x penalty combinations (Demsar 2006).

    Blocks must be independent: splits that share a target city are scored on the same target test
    data, so their means are averaged into one block per target. Only combinations with a value in
    every split enter (the others are named in `dropped_combos`). Needs >= 2 targets and >= 3
    combinations; otherwise `available` is False with the reason. `rejects`: the Iman-Davenport p is
    below alpha; only then is the critical difference read. Mean ranks are of the oriented loss, 1 = best.
    """
    metric = summary["metric"].iloc[0]
    table = summary.pivot_table(index="split_id", columns="combo", values="mean", aggfunc="first")
    complete = table.columns[table.notna().all(axis=0)]
    dropped = sorted(set(table.columns) - set(complete))
    target_of = summary.groupby("split_id")["target"].first()
    blocks = table[complete].groupby(target_of.reindex(table.index)).mean()
    result = {"available": False, "n_splits": int(table.shape[0]), "n_blocks": int(blocks.shape[0]),
              "blocks": [str(t) for t in blocks.index], "k": int(blocks.shape[1]), "dropped_combos": dropped,
              "caveat": MULTIPLE_COMPARISON_CAVEAT, "selection_rule": summary["selection_rule"].iloc[0],
              "metric": metric, "alpha": alpha}
    if blocks.shape[0] < 2 or blocks.shape[1] < 3:
        result["reason"] = (f"needs >= 2 target cities (independent blocks) and >= 3 combinations present in "
                            f"every split, got {blocks.shape[0]} targets x {blocks.shape[1]} combinations")
        return result
    n, k = int(blocks.shape[0]), int(blocks.shape[1])
    chi2, p_value, mean_ranks = stats.friedman(as_loss(blocks.to_numpy(), metric))
    f_stat, f_p, df1, df2 = stats.iman_davenport(chi2, n, k)
    result.update({"available": True, "chi2": chi2, "p_value": p_value, "f_stat": f_stat, "f_p_value": f_p,
                   "f_df": [df1, df2], "rejects": bool(f_p < alpha), "cd": stats.nemenyi_cd(k, n, alpha),
                   "mean_ranks": dict(sorted(zip(blocks.columns, map(float, mean_ranks)),
                                             key=lambda item: item[1]))})
    return result
