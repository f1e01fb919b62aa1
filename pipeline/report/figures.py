"""Figures of the report, drawn with matplotlib (Agg backend, no display) and returned as Figures.

Reads tables handed over by pipeline.report.html (grid summary, run table, Friedman result, shift
table); writes nothing (`png_base64` turns a figure into an embeddable string). Config keys obeyed
(passed in): report.figure_dpi. Every figure built from one selection rule carries
pipeline.selection.label(rule) in its title, so target-peek figures always read "upper bound".
"""

from __future__ import annotations

import base64
import io

import matplotlib

matplotlib.use("Agg")  # no display, no network: the report is built in batch jobs
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from pipeline import grid_stats, names, selection, stats  # noqa: E402
from pipeline.metrics import EXCEEDANCE_SCORES  # noqa: E402
from pipeline.step_words import step_words  # noqa: E402

BEST_MARK = "★"  # marks the best cell of a split in addition to its outline (never colour alone)
plt.rcParams.update({"font.size": 9, "axes.titlesize": 10, "figure.titlesize": 11, "axes.spines.top": False,
                     "axes.spines.right": False})


def png_base64(fig, dpi: int = 100) -> str:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=dpi, bbox_inches="tight")
    plt.close(fig)
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def _title(text: str, rule: str) -> str:
    return f"{text}\nselection: {selection.label(rule)}"


def _ordered_combos(summary: pd.DataFrame) -> list[str]:
    """Columns ordered by model, then ERM / n/a before the penalties, so twins sit side by side."""
    order = summary[["model", "penalty", "combo"]].drop_duplicates()
    order = order.assign(key=order["penalty"].map(lambda p: (p not in (names.ERM, names.NOT_APPLICABLE), p)))
    return order.sort_values(["model", "key"])["combo"].tolist()


# A heatmap row is 0.62 in high and every cell is a text matplotlib lays out several times: past this many
# splits the figure takes minutes, is too tall to read, and past about 1,000 splits exceeds the 2^16 pixels
# Agg can draw. Then it shows one row per target city; the table below it keeps every split.
HEATMAP_MAX_ROWS = 60


def heatmap_rows(summary: pd.DataFrame) -> tuple[pd.DataFrame, bool]:
    """The heatmap's rows: the splits, or, past HEATMAP_MAX_ROWS of them, one row per target city holding the
    mean over that target's splits of each combination's cell means, with the change vs ERM and the best
    combination recomputed from those means (the Friedman blocks average splits that share a target the same
    way). Returns (rows, averaged)."""
    if summary["split"].nunique() <= HEATMAP_MAX_ROWS:
        return summary, False
    metric, label = summary["metric"].iloc[0], summary["metric_label"].iloc[0]
    rows = (summary.groupby(["target", "model", "penalty", "combo"], sort=True, dropna=False)
            .agg(mean=("mean", "mean"), n_splits=("split_id", "nunique")).reset_index())
    erm = rows[rows["penalty"] == names.ERM]
    erm_mean = dict(zip(zip(erm["target"], erm["model"]), erm["mean"]))
    twin = np.array([erm_mean.get((t, m), np.nan) for t, m in zip(rows["target"], rows["model"])], dtype=np.float64)
    penalised = ~rows["penalty"].isin([names.ERM, names.NOT_APPLICABLE]).to_numpy()
    rows["vs_erm_change"] = np.where(penalised, stats.relative_change(rows["mean"].to_numpy(), twin), np.nan)
    splits = rows.groupby("target")["n_splits"].transform("max")
    rows["split"] = [f"→ {target} ({count} splits)" for target, count in zip(rows["target"], splits)]
    loss = grid_stats.as_loss(rows["mean"], metric)
    rows["best_in_split"] = loss == pd.Series(loss).groupby(rows["target"].to_numpy()).transform("min").to_numpy()
    return rows.assign(metric=metric, metric_label=label), True


def grid_heatmap(summary: pd.DataFrame, rule: str):
    """Rows source -> target, columns model x penalty; numbers = mean metric and the change vs ERM written
    exactly as the report table and `shiftgrid grid` write it (grid_stats.format_change: negative = the
    penalty lowered the metric); colour = whether that change is better (blue) or worse (red). Past
    HEATMAP_MAX_ROWS splits, one row per target city (`heatmap_rows`), said in the title."""
    summary, averaged = heatmap_rows(summary)
    combos = _ordered_combos(summary)
    splits = sorted(summary["split"].unique())
    gain = summary.assign(gain=grid_stats.gain_vs_erm(summary) * 100.0)
    values = gain.pivot_table(index="split", columns="combo", values="mean", aggfunc="first").reindex(splits)
    colour = gain.pivot_table(index="split", columns="combo", values="gain", aggfunc="first", dropna=False)
    colour = colour.reindex(index=splits, columns=combos)
    change = gain.pivot_table(index="split", columns="combo", values="vs_erm_change", aggfunc="first",
                              dropna=False).reindex(index=splits, columns=combos)
    best = gain[gain["best_in_split"]].groupby("split")["combo"].apply(set)
    limit = max(1.0, float(np.nanmax(np.abs(colour.to_numpy()))) if np.isfinite(colour.to_numpy()).any() else 1.0)
    fig, ax = plt.subplots(figsize=(max(6.0, 1.25 * len(combos) + 2.5), 0.62 * len(splits) + 2.4))
    cmap = plt.get_cmap("RdBu").with_extremes(bad="#eeeeee")
    image = ax.imshow(np.ma.masked_invalid(colour.to_numpy(np.float64)), cmap=cmap, vmin=-limit, vmax=limit,
                      aspect="auto")
    metric, label = summary["metric"].iloc[0], summary["metric_label"].iloc[0]
    for i, split in enumerate(splits):
        for j, combo in enumerate(combos):
            mean = values.at[split, combo] if combo in values.columns else np.nan
            text = "–" if not np.isfinite(mean) else f"{mean:.3g}"
            if np.isfinite(change.iat[i, j]):
                text += f"\n{grid_stats.format_change(change.iat[i, j])}"
            is_best = combo in best.get(split, set())
            if is_best:
                text = f"{BEST_MARK} {text}"
                ax.add_patch(plt.Rectangle((j - 0.5, i - 0.5), 1, 1, fill=False, lw=2.2, ec="black"))
            ax.text(j, i, text, ha="center", va="center", fontsize=8, fontweight="bold" if is_best else "normal")
    ax.set_xticks(range(len(combos)), combos, rotation=30, ha="right")
    ax.set_yticks(range(len(splits)), splits)
    rows = ("target city (mean over its splits: more than "
            f"{HEATMAP_MAX_ROWS} splits; the table lists each)") if averaged else "split"
    ax.set_title(_title(f"{label} by {rows} and model+penalty ({grid_stats.direction_text(metric)}); "
                        f"{BEST_MARK} = best in {'row' if averaged else 'split'}\nsecond line: change vs ERM twin, % "
                        "(negative = the penalty lowered the metric)", rule))
    bar = fig.colorbar(image, ax=ax, fraction=0.04, pad=0.02)
    bar.set_label("better (+) or worse (-) than the ERM twin, %\n(blue = better, grey = no twin)")
    fig.tight_layout()
    return fig


def cd_chart(friedman: dict, rule: str):
    """Mean ranks over target cities (1 = best) with the Nemenyi critical difference drawn from the best
    combination. Drawn only when the omnibus test rejects (pipeline.report.html.ranks_section)."""
    ranks = friedman["mean_ranks"]
    names, values = list(ranks), np.array(list(ranks.values()))
    cd = friedman["cd"]
    fig, ax = plt.subplots(figsize=(7.5, 0.38 * len(names) + 1.9))
    positions = np.arange(len(names))[::-1]
    best = values.min()
    ax.axvspan(best, best + cd, color="#c6dbef", alpha=0.7, label=f"within CD = {cd:.2f} of the best")
    within = values <= best + cd
    ax.scatter(values, positions, s=40, c=np.where(within, "#08519c", "#969696"), zorder=3)
    for name, value, y in zip(names, values, positions):
        ax.text(value + 0.05, y + 0.18, f"{value:.2f}", fontsize=8)
    ax.set_yticks(positions, names)
    ax.set_xlim(0.5, len(names) + 0.5)
    ax.set_xlabel(f"mean rank over {friedman['n_blocks']} target cities (1 = best)")
    ax.legend(loc="lower right", fontsize=8, frameon=False)
    ax.set_title(_title(f"Mean ranks, Iman-Davenport p = {friedman['f_p_value']:.3g} "
                        f"({friedman['n_blocks']} target cities x {friedman['k']} combinations)", rule))
    fig.tight_layout()
    return fig


def horizon_columns(runs: pd.DataFrame, rule: str) -> list[str]:
    prefix = f"{rule}.target_mae_h"
    return sorted((col for col in runs.columns if col.startswith(prefix)), key=lambda c: int(c[len(prefix):]))


def horizon_curves(runs: pd.DataFrame, rule: str, variable: str, step_hours: float = 1.0):
    """Target MAE per horizon step, averaged over seeds then splits, one line per model+penalty;
    one panel per target city; the axis counts steps in the cadence's unit (pipeline.step_words)."""
    columns = horizon_columns(runs, rule)
    steps = [int(col.rsplit("_h", 1)[1]) for col in columns]
    table = runs.assign(combo=[grid_stats.combo_label(m, p) for m, p in zip(runs["model"], runs["penalty"])])
    targets = sorted(table["target"].unique())
    cols = min(3, len(targets))
    rows = int(np.ceil(len(targets) / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(4.2 * cols, 3.0 * rows + 0.8), squeeze=False, sharey=True)
    for ax, target in zip(axes.ravel(), targets):
        per_split = table[table["target"] == target].groupby(["combo", "split_id"])[columns].mean()
        for combo, curve in per_split.groupby(level="combo"):
            style = "--" if combo.endswith("+erm") else "-"
            ax.plot(steps, curve.mean().to_numpy(), style, lw=1.4, label=combo)
        ax.set_title(f"target {target}")
        ax.set_xlabel(f"horizon ({step_words(step_hours).plural} ahead)")
        ax.grid(alpha=0.3)
    for ax in axes.ravel()[len(targets):]:
        ax.set_visible(False)
    axes[0, 0].set_ylabel(grid_stats.metric_label("target_mae", variable))
    handles, labels = axes[0, 0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="lower center", ncol=min(5, len(labels)), fontsize=8, frameon=False)
    fig.suptitle(_title(f"{grid_stats.metric_label('target_mae', variable)} by forecast horizon (dashed = ERM)",
                        rule))
    fig.tight_layout(rect=(0, 0.1, 1, 1))
    return fig


# The scores on a 0-1 scale; bias (best at 1, unbounded) would flatten their bars.
BARRED_SCORES = tuple(s for s in EXCEEDANCE_SCORES if s not in grid_stats.BEST_AT_ONE)


def exceedance_bars(runs: pd.DataFrame, rule: str, event: str | None = None):
    """POD, FAR, CSI, ETS of each model+penalty, averaged over seeds and splits (NaN-aware); `event` names
    the scored event (grid_stats.threshold_note)."""
    columns = [f"{rule}.target_{score}" for score in BARRED_SCORES if f"{rule}.target_{score}" in runs.columns]
    table = runs.assign(combo=[grid_stats.combo_label(m, p) for m, p in zip(runs["model"], runs["penalty"])])
    means = table.groupby(["combo", "split_id"])[columns].mean().groupby(level="combo").mean()
    fig, ax = plt.subplots(figsize=(max(6.5, 0.9 * len(means) + 2.5), 3.6))
    width = 0.8 / max(1, len(columns))
    for index, column in enumerate(columns):
        score = column.rsplit("_", 1)[1]
        arrow = "↓" if score == "far" else "↑"
        ax.bar(np.arange(len(means)) + index * width, means[column].to_numpy(), width,
               label=f"{score.upper()} {arrow}", hatch=["", "//", "..", "xx"][index % 4], edgecolor="white")
    ax.set_xticks(np.arange(len(means)) + width * (len(columns) - 1) / 2, means.index, rotation=30, ha="right")
    ax.set_ylim(0, 1)
    ax.legend(ncol=len(columns), fontsize=8, frameon=False, loc="upper right")
    ax.set_title(_title(f"Exceedance scores; ↑ higher is better, ↓ lower is better"
                        + (f"\nevent: {event}" if event else ""), rule))
    fig.tight_layout()
    return fig


def selection_comparison(summary_all: pd.DataFrame):
    """Mean metric of each model+penalty under every logged selection rule (peek = upper bound)."""
    metric = summary_all["metric_label"].iloc[0]
    per_rule = summary_all.groupby(["combo", "selection_rule"])["mean"].mean().unstack("selection_rule")
    rules = [rule for rule in selection.RULES if rule in per_rule.columns]
    fig, ax = plt.subplots(figsize=(max(6.5, 0.9 * len(per_rule) + 2.5), 3.8))
    width = 0.8 / max(1, len(rules))
    for index, rule in enumerate(rules):
        ax.bar(np.arange(len(per_rule)) + index * width, per_rule[rule].to_numpy(), width,
               label=selection.label(rule), hatch="//" if selection.uses_target_data(rule) else "",
               edgecolor="white")
    ax.set_xticks(np.arange(len(per_rule)) + width * (len(rules) - 1) / 2, per_rule.index, rotation=30, ha="right")
    ax.set_ylabel(f"mean {metric} over splits")
    ax.legend(fontsize=8, frameon=False)
    ax.set_title(f"{metric} under each selection rule; selection: "
                 f"{', '.join(selection.label(rule) for rule in rules)}")
    fig.tight_layout()
    return fig


def shift_figure(shift: pd.DataFrame, points: pd.DataFrame, rule: str, rho: float, p_value: float):
    """Left: energy distance vs geographic distance per city pair. Right: split error vs its shift."""
    fig, (left, right) = plt.subplots(1, 2, figsize=(10, 3.8))
    left.scatter(shift["geo_km"], shift["energy_distance"], color="#3182bd")
    for row in shift.itertuples():
        left.annotate(f"{row.city_a}–{row.city_b}", (row.geo_km, row.energy_distance), fontsize=7,
                      xytext=(3, 3), textcoords="offset points")
    left.set_xlabel("distance between city centroids (km)")
    left.set_ylabel("energy distance (standardised features)")
    left.set_title("Feature shift vs geographic distance")
    if not points.empty:
        right.scatter(points["shift"], points["mean"], color="#e6550d")
        for row in points.itertuples():
            right.annotate(row.split, (row.shift, row.mean), fontsize=7, xytext=(3, 3), textcoords="offset points")
    right.set_xlabel("mean source–target energy distance")
    right.set_ylabel(f"{points['metric'].iloc[0] if not points.empty else 'target error'}\n(mean over combinations)")
    right.set_title(_title(f"Target error vs shift (Spearman ρ = {rho:.2f}, p = {p_value:.2g})", rule))
    fig.tight_layout()
    return fig


def weight_sensitivity(table: pd.DataFrame, reference: dict[str, float], metric_label: str, rule: str):
    """Mean target error of the search trials against their penalty weight, one panel per model and one line
    per penalty (`table`: model, penalty, weight, mean); dashed: the model's ERM runs (the trials their rule
    selected). Reading a weight off it uses target data, so the title names the upper bound."""
    models = sorted(table["model"].unique())
    fig, axes = plt.subplots(1, len(models), figsize=(3.8 * len(models) + 1.0, 3.5), squeeze=False, sharey=True)
    for ax, model in zip(axes[0], models):
        rows = table[table["model"] == model]
        for penalty, points in rows.groupby("penalty", sort=True):
            points = points.sort_values("weight")
            ax.plot(points["weight"], points["mean"], "o-", lw=1.4, label=names.penalty_shown(penalty))
        if np.isfinite(reference.get(model, np.nan)):
            ax.axhline(reference[model], ls="--", lw=1.2, color="#636363", label="erm (selected trial)")
        if (rows["weight"] > 0).all():
            ax.set_xscale("log")
        else:  # a weight of 0 has no place on a log axis
            ax.set_xscale("symlog", linthresh=float(rows.loc[rows["weight"] > 0, "weight"].min(initial=1.0)))
        ax.set_title(model)
        ax.set_xlabel("penalty weight")
        ax.grid(alpha=0.3)
        ax.legend(fontsize=8, frameon=False)
    axes[0, 0].set_ylabel(f"mean {metric_label}\n(target test block, every trial)")
    fig.suptitle(f"Target error against the penalty weight (checkpoints: {selection.label(rule)})\nuses target "
                 f"data: a weight read off this figure is {selection.UPPER_BOUND_LABEL}")
    fig.tight_layout()
    return fig
