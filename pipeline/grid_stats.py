"""Statistics of the comparison grid, computed from the one-row-per-run table (results/grid.parquet).

Pure pandas/numpy functions on tables handed over by pipeline.aggregate (the I/O shell); nothing is
read or written here. Config keys obeyed (passed in by the caller): report.metric, report.selection,
report.bootstrap_samples. The tests themselves (Diebold-Mariano + HLN, Friedman, Nemenyi CD, bootstrap
interval, win/tie/loss, relative change) live in pipeline.stats; this module only arranges the grid.

Orientation: errors (mae, rmse, mse, mase, far, ...) are better when smaller; pod, csi and ets when
larger; bias is best at 1. Ranks and win/tie/loss use an oriented *loss* (smaller = better) so one code
path serves every metric; reported means and relative changes stay in the metric's own direction.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline import selection, stats
from pipeline.errors import InputError

HIGHER_IS_BETTER = frozenset({"pod", "csi", "ets"})
BEST_AT_ONE = frozenset({"bias"})
BASELINE_PENALTY = "erm"
NOT_APPLICABLE = "na"  # penalty of families that are not gradient-trained
ID_COLUMNS = ("split_id", "sources", "target", "model", "family", "penalty")
MULTIPLE_COMPARISON_CAVEAT = (
    "The Nemenyi critical difference controls the family-wise error over all pairwise comparisons of "
    "mean ranks; the per-pair Diebold-Mariano p-values are NOT corrected for multiple comparisons, and "
    "splits that share cities are not fully independent blocks, so read small p-values with care.")


def penalty_display(penalty: str) -> str:
    return "n/a" if penalty == NOT_APPLICABLE else penalty


def combo_label(model: str, penalty: str) -> str:
    return f"{model}+{penalty_display(penalty)}"


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


def summarise(runs: pd.DataFrame, metric: str, rule: str, n_boot: int = 2000, seed: int = 0) -> pd.DataFrame:
    """One row per split x model x penalty: mean, std, n_seeds, 95% bootstrap CI, ranks, change vs ERM.

    Runs whose metric is NaN are not averaged but counted in `n_missing`. rank = rank of the mean
    within its split (1 = best; ties averaged); mean_rank = average of a combination's ranks over the
    splits. vs_erm_*: the penalty against the ERM run of the same split and model (relative change of
    the mean, in the metric's own direction) and, per model x penalty, win/tie/loss over splits.
    """
    column = metric_column(runs.columns, metric, rule)
    rows = []
    for key, group in runs.groupby(list(ID_COLUMNS), sort=True, dropna=False):
        values = group[column].to_numpy(np.float64)
        finite = values[np.isfinite(values)]
        low, high = (stats.bootstrap_ci(finite, n_boot=n_boot, seed=seed) if finite.size
                     else (np.nan, np.nan))
        rows.append({**dict(zip(ID_COLUMNS, key)),
                     "combo": combo_label(key[3], key[5]), "split": split_label(key[1], key[2]),
                     "selection_rule": rule, "selection_label": selection.label(rule),
                     "metric": column.split(".", 1)[-1], "direction": direction_text(column),
                     "mean": float(finite.mean()) if finite.size else np.nan,
                     "std": float(finite.std(ddof=1)) if finite.size > 1 else np.nan,
                     "n_seeds": int(finite.size), "n_missing": int(values.size - finite.size),
                     "ci_low": low, "ci_high": high,
                     "run_ids": ";".join(group.sort_values("seed")["run_id"].astype(str))})
    summary = pd.DataFrame(rows)
    if summary.empty:
        raise InputError("no runs to summarise", field="runs")
    summary["loss"] = as_loss(summary["mean"], column)
    summary["rank"] = stats.rank_within(summary, ["split_id"], "loss")
    summary["mean_rank"] = summary.groupby("combo")["rank"].transform("mean")
    summary["best_in_split"] = summary["rank"] == summary.groupby("split_id")["rank"].transform("min")
    return _add_erm_comparison(summary, column).drop(columns="loss")


def _add_erm_comparison(summary: pd.DataFrame, column: str) -> pd.DataFrame:
    erm = summary[summary["penalty"] == BASELINE_PENALTY].set_index(["split_id", "model"])
    summary = summary.copy()
    for name in ("vs_erm_change", "vs_erm_wins", "vs_erm_ties", "vs_erm_losses", "vs_erm_missing"):
        summary[name] = np.nan
    penalised = ~summary["penalty"].isin([BASELINE_PENALTY, NOT_APPLICABLE])
    for (model, penalty), group in summary[penalised].groupby(["model", "penalty"]):
        twins = [erm.loc[(split, model)] if (split, model) in erm.index else None
                 for split in group["split_id"]]
        base_mean = np.array([twin["mean"] if twin is not None else np.nan for twin in twins])
        summary.loc[group.index, "vs_erm_change"] = stats.relative_change(group["mean"].to_numpy(), base_mean)
        tally = stats.win_tie_loss(as_loss(group["mean"], column), as_loss(base_mean, column))
        for outcome in ("wins", "ties", "losses", "missing"):
            summary.loc[group.index, f"vs_erm_{outcome}"] = tally[outcome]
    return summary


def gain_vs_erm(summary: pd.DataFrame) -> np.ndarray:
    """Relative change turned so that positive = better than ERM, whatever the metric's direction."""
    sign = np.where([higher_is_better(m) for m in summary["metric"]], 1.0, -1.0)
    return sign * summary["vs_erm_change"].to_numpy(np.float64)


def friedman_over_splits(summary: pd.DataFrame) -> dict:
    """Friedman test + Nemenyi CD over model x penalty combinations, splits as blocks (Demsar 2006).

    Only complete blocks enter: a combination missing (or NaN) in some split is left out and named in
    `dropped_combos`. Needs >= 2 splits and >= 2 combinations; otherwise `available` is False with the
    reason. Mean ranks are of the oriented loss, 1 = best.
    """
    metric = summary["metric"].iloc[0]
    table = summary.pivot_table(index="split_id", columns="combo", values="mean", aggfunc="first")
    complete = table.columns[table.notna().all(axis=0)]
    dropped = sorted(set(table.columns) - set(complete))
    table = table[complete]
    result = {"available": False, "n_splits": int(table.shape[0]), "k": int(table.shape[1]),
              "dropped_combos": dropped, "caveat": MULTIPLE_COMPARISON_CAVEAT,
              "selection_rule": summary["selection_rule"].iloc[0], "metric": metric}
    if table.shape[0] < 2 or table.shape[1] < 2:
        result["reason"] = (f"needs >= 2 splits and >= 2 complete combinations, got {table.shape[0]} "
                            f"splits x {table.shape[1]} combinations")
        return result
    chi2, p_value, mean_ranks = stats.friedman(as_loss(table.to_numpy(), metric))
    result.update({"available": True, "chi2": chi2, "p_value": p_value,
                   "cd": stats.nemenyi_cd(int(table.shape[1]), int(table.shape[0])), "alpha": 0.05,
                   "mean_ranks": dict(sorted(zip(table.columns, map(float, mean_ranks)),
                                             key=lambda item: item[1]))})
    return result


def window_losses(predictions: pd.DataFrame, rule: str) -> pd.Series:
    """Mean absolute error over the horizon of every forecast window, indexed by (station_id, origin).

    `predictions` is a run's predictions artifact (y_hXX / p_hXX columns, one row per window and rule).
    A window whose pairs are all NaN has no loss and is left out (the caller counts pairs).
    """
    chosen = predictions[predictions["selection"] == rule]
    y_cols = sorted(col for col in chosen.columns if col.startswith("y_h"))
    p_cols = [f"p{col[1:]}" for col in y_cols]
    errors = np.abs(chosen[y_cols].to_numpy(np.float64) - chosen[p_cols].to_numpy(np.float64))
    counts = np.isfinite(errors).sum(axis=1)
    loss = np.where(counts > 0, np.nansum(errors, axis=1) / np.maximum(counts, 1), np.nan)
    index = pd.MultiIndex.from_arrays([chosen["station_id"].astype(str).to_numpy(),
                                       pd.to_datetime(chosen["origin"], utc=True).to_numpy()],
                                      names=["station_id", "origin"])
    return pd.Series(loss, index=index).dropna()


def seed_mean(losses: list[pd.Series]) -> pd.Series:
    """Average the window losses of several seeds, window by window (windows all seeds share)."""
    joined = pd.concat(losses, axis=1, join="inner")
    return joined.mean(axis=1)


def paired_dm(penalised: list[pd.Series], erm: list[pd.Series], horizon: int) -> dict:
    """Diebold-Mariano + HLN of a penalty's window losses against its ERM twin's.

    Windows are paired by (station_id, origin) after averaging over seeds; the differences are then
    averaged over stations at each origin, giving one time-ordered series at the forecast stride, on
    which h = horizon (overlapping multi-step windows). d = loss(penalty) - loss(ERM): a negative
    statistic means the penalty has the smaller error. `fallback` flags the h = 1 variance fallback.
    """
    empty = {"dm_stat": np.nan, "dm_hln": np.nan, "dm_p": np.nan, "dm_fallback": False,
             "dm_n": 0, "dm_h": horizon, "dm_mean_diff": np.nan}
    if not penalised or not erm:
        return empty
    pairs = pd.concat([seed_mean(penalised), seed_mean(erm)], axis=1, join="inner").dropna()
    diff = (pairs.iloc[:, 0] - pairs.iloc[:, 1]).groupby(level="origin").mean().sort_index()
    size = len(diff)
    if size < 3:
        return {**empty, "dm_n": size}
    h = int(min(horizon, size - 1))
    result = stats.diebold_mariano(diff.to_numpy(), h)
    return {"dm_stat": result.statistic, "dm_hln": result.hln_statistic, "dm_p": result.p_value,
            "dm_fallback": result.variance_fallback, "dm_n": size, "dm_h": h,
            "dm_mean_diff": float(diff.mean())}
