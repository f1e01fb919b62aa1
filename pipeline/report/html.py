"""Assemble results/report.html: one self-contained page, figures embedded as base64 PNG, no network.

Reads (paths handed over by the `render_report` rule or a caller): results/grid.parquet, grid.csv,
grid_meta.json, grid_trials.csv (the search section, pipeline.report.search_html), results/shift.csv
(optional), data/qc/<city>.json and results/splits/<split_id>.json.
Writes the HTML file. Config keys obeyed (the report slice): report.title, report.selection,
report.figure_dpi, report.top_rows (rows of the summary table shown per split, best first); and
data.ground_truth for the verdict (pipeline.report.verdict_html), which opens the page.
Every figure and table that shows numbers of one selection rule names it with
pipeline.selection.label, so anything from target-peek reads "upper bound".
"""

from __future__ import annotations

import datetime as dt
import html
import json
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline import grid_stats, names, selection
from pipeline.atomic import write_text_atomic
from pipeline.caution import CAUTION  # one wording of the caution for the CLI and the report
from pipeline.ingest.qc import summary_row
from pipeline.report import figures, shift_data
from pipeline.report.blocks import figure as _figure, rule_caption as _rule_caption, table as _table
from pipeline.report.search_html import search_section
from pipeline.report.style import CSS
from pipeline.report.verdict_html import verdict_section

E = html.escape


def setup_section(meta: dict, runs: pd.DataFrame, qc: dict[str, dict], splits: list[dict]) -> str:
    skipped = "; ".join(f"{info['count']} {reason}" for reason, info in meta.get("skipped", {}).items()) or "none"
    facts = [("experiment", ", ".join(meta.get("experiment", []))),
             ("tracking store", ", ".join(meta.get("tracking_uris", []))),
             ("runs in the grid", f"{meta['n_runs']} of {meta['n_records']} run records (skipped: {skipped})"),
             ("metric", meta.get("metric_label", meta["metric"])),
             ("selection rules logged", ", ".join(selection.label(rule) for rule in meta["rules"])),
             ("models", ", ".join(sorted(runs["model"].unique()))),
             ("penalties", ", ".join(names.penalty_shown(p) for p in sorted(runs["penalty"].unique()))),
             ("seeds", ", ".join(map(str, sorted(runs["seed"].unique()))))]
    items = "".join(f"<dt>{E(k)}</dt><dd>{E(v)}</dd>" for k, v in facts)
    split_rows = pd.DataFrame([{"split": grid_stats.split_label(s["sources"], s["target"]), "scheme": s.get("scheme"),
                                "environment": s.get("environment"),
                                "train": " / ".join(s.get("time_blocks", {}).get("train", [])),
                                "test": " / ".join(s.get("time_blocks", {}).get("test", [])),
                                "split_id": s["split_id"]} for s in splits])
    qc_rows = pd.DataFrame([{"city": city, **summary_row(report)} for city, report in sorted(qc.items())])
    parts = [f'<section id="setup"><h2>Setup</h2><dl class="facts">{items}</dl>']
    if not split_rows.empty:
        parts.append(_table(split_rows, "Splits (time blocks: UTC, start inclusive / end exclusive)"))
    if not qc_rows.empty:
        parts.append(_table(qc_rows, "Data coverage and quality control per city (from data/qc/*.json)"))
    return "".join(parts) + "</section>"


def _pair(low, high) -> str:
    return f"[{low:.3g}, {high:.3g}]" if np.isfinite(low) and np.isfinite(high) else "–"


def summary_table(summary: pd.DataFrame, top_rows: int) -> pd.DataFrame:
    """The grid table of one rule; column names carry the metric label, the interval kinds and the sign rule."""
    table = summary.sort_values(["split", "rank"]).groupby("split", sort=True).head(top_rows)
    wtl = [f"{w:.0f}/{t:.0f}/{l:.0f}" if np.isfinite(w) else "–"
           for w, t, l in zip(table["vs_erm_wins"], table["vs_erm_ties"], table["vs_erm_losses"])]
    pvalue = [f"{p:.3g}" if np.isfinite(p) else "–" for p in table["dm_p"]]
    holm = [f"{p:.3g}" if np.isfinite(p) else "–" for p in table["dm_p_holm"]]
    seeds = [f"{_pair(lo, hi)} {kind}" if np.isfinite(lo) else "–"
             for lo, hi, kind in zip(table["seed_low"], table["seed_high"], table["seed_interval"])]
    return pd.DataFrame({"split": table["split"], "best": np.where(table["best_in_split"], figures.BEST_MARK, ""),
                         "model+penalty": table["combo"], f"mean {table['metric_label'].iloc[0]}": table["mean"],
                         "std over seeds": table["std"], "n seeds": table["n_seeds"],
                         "95% CI over test origins (block bootstrap)": [
                             _pair(lo, hi) for lo, hi in zip(table["ci_low"], table["ci_high"])],
                         "spread over seeds": seeds, "rank": table["rank"], "mean rank": table["mean_rank"],
                         "change vs ERM, % (negative = lower)": [grid_stats.format_change(c)
                                                                 for c in table["vs_erm_change"]],
                         "W/T/L vs ERM": wtl, "DM p": pvalue, "DM p, Holm": holm})


def other_rule_columns(table: pd.DataFrame, summary_all: pd.DataFrame, meta: dict,
                       rule: str) -> tuple[pd.DataFrame, dict[str, str]]:
    """The same cells under every other logged selection rule, as extra columns of the one grid table."""
    column_rules = {}
    for other in (r for r in meta["rules"] if r != rule):
        means = summary_all[summary_all["selection_rule"] == other].set_index(["split", "combo"])["mean"]
        name = f"mean under {selection.label(other)}"
        table[name] = [means.get((split, combo), np.nan) for split, combo in zip(table["split"], table["model+penalty"])]
        column_rules[name] = other
    return table, column_rules


def grid_section(summary_all: pd.DataFrame, meta: dict, rule: str, dpi: int, top_rows: int) -> str:
    """One grid: the headline rule's heatmap and table; every other rule is a column of that table."""
    summary = summary_all[summary_all["selection_rule"] == rule]
    label = summary["metric_label"].iloc[0]
    loss = summary["dm_loss"].dropna().iloc[0] if summary["dm_loss"].notna().any() else "absolute"
    parts = ['<section id="grid"><h2>The grid</h2>',
             f"<p>Cells: mean {E(label)} over seeds; {E(grid_stats.change_note(summary['metric'].iloc[0]))}; the "
             f"heatmap's colour shows whether that is better (blue) or worse (red); {figures.BEST_MARK} and a frame "
             "mark the best cell of each split. 95% CI over test origins: moving-block bootstrap of the forecast "
             "origins (blocks of at least ceil(horizon / stride) origins, so overlapping windows stay together; "
             f"{meta.get('bootstrap_samples', '')} resamples), the same blocks for every seed and station. Spread "
             "over seeds: the seed range (min-max) below 3 seeds, a Student t interval from 3 seeds. DM p: "
             f"Diebold-Mariano test on paired per-window {E(loss.replace('_', ' '))} errors against the ERM twin "
             "(two-sided; Newey-West variance with ceil(horizon / stride) - 1 Bartlett lags, origins dropped for "
             "missing data kept apart; Harvey-Leybourne-Newbold factor, Student t); DM p, Holm: adjusted over every "
             "penalised-vs-ERM comparison of the grid under this selection rule. Ranks, spread and tests use the "
             "headline selection rule; the last columns give the same cell's mean under each other logged rule.</p>",
             _figure(figures.grid_heatmap(summary, rule), dpi,
                     _rule_caption(f"Grid heatmap of {label}", rule), rule)]
    table, column_rules = other_rule_columns(summary_table(summary, top_rows), summary_all, meta, rule)
    parts.append(_table(table, _rule_caption(f"Summary per split (best {top_rows} per split)", rule), rule, "grid",
                        column_rules))
    return "".join(parts) + "</section>"


def ranks_section(summary_all: pd.DataFrame, meta: dict, rule: str, dpi: int) -> str:
    """Friedman and Iman-Davenport over target cities; the critical-difference chart only when they reject."""
    parts = ['<section id="ranks"><h2>Ranks and critical difference</h2>']
    for each in meta["rules"]:
        result = meta["friedman"].get(each, {})
        if not result.get("available"):
            parts.append(f'<p data-selection="{E(each)}">Friedman test not available under '
                         f"{E(selection.label(each))}: {E(result.get('reason', 'no result'))}.</p>")
            continue
        dropped = ", ".join(result["dropped_combos"]) or "none"
        verdict = (f"the omnibus test rejects equal mean ranks at alpha {result['alpha']:g}; Nemenyi CD = "
                   f"{result['cd']:.3g}" if result["rejects"] else
                   f"the omnibus test does not reject equal mean ranks at alpha {result['alpha']:g}, so no "
                   "critical-difference chart is drawn: the ranks below are not distinguishable")
        parts.append(f'<p data-selection="{E(each)}"><strong>{E(selection.label(each))}</strong>: blocks = '
                     f"{result['n_blocks']} target cities ({E(', '.join(result['blocks']))}; {result['n_splits']} "
                     f"splits, those sharing a target averaged), {result['k']} combinations: Friedman "
                     f"chi² = {result['chi2']:.3g} (p = {result['p_value']:.3g}), Iman-Davenport F = "
                     f"{result['f_stat']:.3g} with ({result['f_df'][0]}, {result['f_df'][1]}) df, p = "
                     f"{result['f_p_value']:.3g}: {E(verdict)}. Combinations left out (missing in some split): "
                     f"{E(dropped)}.</p>")
        if result["rejects"] and (each == rule or len(meta["rules"]) == 1):
            parts.append(_figure(figures.cd_chart(result, each), dpi,
                                 _rule_caption(f"Mean ranks over target cities of {summary_all['metric_label'].iloc[0]}"
                                               f" and Nemenyi critical difference (alpha {result['alpha']:g})",
                                               each), each))
    parts.append(f'<p class="note">{E(grid_stats.MULTIPLE_COMPARISON_CAVEAT)}</p>')
    if len(meta["rules"]) > 1:
        parts.append(_figure(figures.selection_comparison(summary_all), dpi,
                             f"{summary_all['metric_label'].iloc[0]} under each selection rule: "
                             + "; ".join(selection.label(r) for r in meta["rules"]),
                             selection.PEEK if selection.PEEK in meta["rules"] else None))
    return "".join(parts) + "</section>"


def curves_section(runs: pd.DataFrame, rule: str, dpi: int) -> str:
    variable = str(grid_stats.run_setting(runs, "forecast.target", "forecast.target"))
    parts = ['<section id="horizon"><h2>Error by horizon and exceedance scores</h2>']
    if figures.horizon_columns(runs, rule):
        parts.append(_figure(figures.horizon_curves(runs, rule, variable), dpi,
                             _rule_caption(f"{grid_stats.metric_label('target_mae', variable)} per forecast hour",
                                           rule), rule))
    if any(col.startswith(f"{rule}.target_csi") for col in runs.columns):
        threshold = float(grid_stats.run_setting(runs, "metrics.hourly_exceedance_threshold",
                                                 "metrics.hourly_exceedance_threshold"))
        note = grid_stats.threshold_note(variable, threshold)
        parts.append(f"<p>Exceedance scores count the event of a {E(note)}.</p>")
        parts.append(_figure(figures.exceedance_bars(runs, rule, note), dpi,
                             _rule_caption(f"Exceedance scores (POD, FAR, CSI, ETS); {note}", rule), rule))
    return "".join(parts) + "</section>"


def shift_section(shift: pd.DataFrame | None, summary: pd.DataFrame, rule: str, dpi: int) -> str:
    parts = ['<section id="shift"><h2>Shift diagnostics</h2>']
    if shift is None or shift.empty:
        return "".join(parts) + "<p>No shift table (fewer than two cities).</p></section>"
    points, rho, p_value = shift_data.error_vs_shift(shift, summary)
    if not points.empty:  # the figure's axis names the metric with its variable and unit
        points["metric"] = summary["metric_label"].iloc[0]
    parts.append("<p>Energy distance and mean per-variable Wasserstein-1 distance between cities on features "
                 "standardised over all cities, next to the distance between city centroids. Right panel: each "
                 "split's target error (mean over model+penalty combinations) against the mean shift between "
                 f"its sources and its target; Spearman rank correlation over {len(points)} splits"
                 f" ({points.attrs.get('excluded', 0)} within-city splits left out).</p>")
    parts.append(_figure(figures.shift_figure(shift, points, rule, rho, p_value), dpi,
                         _rule_caption("Shift diagnostics", rule), rule))
    parts.append(_table(shift[["city_a", "city_b", "energy_distance", "mean_wasserstein", "geo_km",
                               "n_rows_a", "n_rows_b"]], "Pairwise city shift (standardised features)"))
    return "".join(parts) + "</section>"


def provenance_section(runs: pd.DataFrame, meta: dict, rule: str) -> str:
    column = grid_stats.metric_column(runs.columns, meta["metric"], rule)
    table = pd.DataFrame({"split": [grid_stats.split_label(s, t) for s, t in zip(runs["sources"], runs["target"])],
                          "model": runs["model"], "penalty": runs["penalty"].map(names.penalty_shown),
                          "seed": runs["seed"],
                          f"{grid_stats.grid_metric_label(runs, column)} ({column})": runs[column],
                          "run_id": runs["run_id"],
                          "code": runs.get("tag.code_digest", ""), "commit": runs.get("tag.git.commit", "")})
    table["commit"] = table["commit"].astype(str).str[:10]
    return ('<section id="provenance"><h2>Provenance</h2><p>Every number above is a mean over the runs below; '
            "<code>shiftgrid show RUN_ID</code> prints everything recorded about one run and "
            "<code>shiftgrid verify RUN_ID</code> re-trains it.</p>"
            + _table(table, _rule_caption("Runs in the grid", rule), rule, "provenance") + "</section>")


def load_inputs(grid_dir: Path, qc_paths, split_paths, shift_path):
    runs = pd.read_parquet(grid_dir / "grid.parquet")
    summary = pd.read_csv(grid_dir / "grid.csv", keep_default_na=False, na_values=["", "nan", "NaN"])
    meta = json.loads((grid_dir / "grid_meta.json").read_text())
    qc = {Path(p).stem: json.loads(Path(p).read_text()) for p in qc_paths}
    splits = [json.loads(Path(p).read_text()) for p in split_paths]
    shift = pd.read_csv(shift_path) if shift_path and Path(shift_path).exists() else None
    trials_path = grid_dir / "grid_trials.csv"  # written by the aggregation since the search existed
    trials = pd.read_csv(trials_path) if trials_path.exists() else None
    return runs, summary, meta, qc, splits, shift, trials


def render_report(grid_dir: Path | str, out_path: Path | str, report_cfg: dict, qc_paths=(), split_paths=(),
                  shift_path: Path | str | None = None, ground_truth: dict | None = None) -> str:
    """Build the page and write it to `out_path`; returns the HTML text. The verdict comes first."""
    runs, summary_all, meta, qc, splits, shift, trials = load_inputs(Path(grid_dir), qc_paths, split_paths,
                                                                     shift_path)
    rule = report_cfg.get("selection", selection.HOLDOUT)
    rule = rule if rule in meta["rules"] else meta["rules"][0]
    dpi, top_rows = int(report_cfg.get("figure_dpi", 100)), int(report_cfg.get("top_rows", 12))
    summary = summary_all[summary_all["selection_rule"] == rule]
    title = report_cfg.get("title", "shiftgrid comparison")
    label = meta.get("metric_label", meta["metric"])
    search = search_section(trials, runs, meta, rule, dpi)  # empty without a hyperparameter search
    body = [f"<header><h1>{E(title)}</h1><p class='meta'>metric: {E(label)} · headline selection: "
            f"{E(selection.label(rule))} · generated {dt.datetime.now(dt.timezone.utc):%Y-%m-%d %H:%M} UTC</p>"
            f'<p class="caution" role="note">{E(CAUTION)}</p></header>',
            '<nav><a href="#verdict">Verdict</a><a href="#setup">Setup</a><a href="#grid">Grid</a>'
            + ('<a href="#search">Search</a>' if search else "") +
            '<a href="#ranks">Ranks</a><a href="#horizon">Horizons</a><a href="#shift">Shift</a>'
            '<a href="#provenance">Provenance</a></nav>',
            verdict_section(summary, meta, rule, ground_truth),
            setup_section(meta, runs, qc, splits), grid_section(summary_all, meta, rule, dpi, top_rows), search,
            ranks_section(summary_all, meta, rule, dpi), curves_section(runs, rule, dpi),
            shift_section(shift, summary, rule, dpi), provenance_section(runs, meta, rule),
            f'<footer><p class="caution">{E(CAUTION)}</p></footer>']
    page = (f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{E(title)}</title>'
            f'<meta name="viewport" content="width=device-width, initial-scale=1"><style>{CSS}</style></head>'
            f"<body><main>{''.join(body)}</main></body></html>")
    write_text_atomic(page, out_path)
    return page
