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
import json
from pathlib import Path

import numpy as np
import pandas as pd
from markupsafe import Markup

from pipeline import grid_stats, names, selection, target_sections
from pipeline.atomic import write_text_atomic
from pipeline.caution import CAUTION  # one wording of the caution for the CLI and the report
from pipeline.ingest.qc import summary_row
from pipeline.report import figures, shift_data, targets_html
from pipeline.report.blocks import figure as _figure, rule_caption as _rule_caption, table as _table
from pipeline.report.search_html import search_section
from pipeline.report.style import CSS
from pipeline.report.templating import render
from pipeline.report.verdict_html import verdict_section
from pipeline.step_words import step_words

SETUP = ('<section id="setup"><h2>Setup</h2><dl class="facts">'
         "{% for name, value in facts %}<dt>{{ name }}</dt><dd>{{ value }}</dd>{% endfor %}</dl>{{ tables }}</section>")


def setup_section(meta: dict, runs: pd.DataFrame, qc: dict[str, dict], splits: list[dict]) -> Markup:
    skipped = "; ".join(f"{info['count']} {reason}" for reason, info in meta.get("skipped", {}).items()) or "none"
    facts = [("experiment", ", ".join(meta.get("experiment", []))),
             ("tracking store", ", ".join(meta.get("tracking_uris", []))),
             ("runs in the grid", f"{meta['n_runs']} of {meta['n_records']} run records (skipped: {skipped})"),
             ("metric", meta.get("metric_label", meta["metric"])),
             ("selection rules logged", ", ".join(selection.label(rule) for rule in meta["rules"])),
             ("models", ", ".join(sorted(runs["model"].unique()))),
             ("penalties", ", ".join(names.penalty_shown(p) for p in sorted(runs["penalty"].unique()))),
             ("seeds", ", ".join(map(str, sorted(runs["seed"].unique()))))]
    split_rows = pd.DataFrame([{"split": grid_stats.split_label(s["sources"], s["target"]), "scheme": s.get("scheme"),
                                "environment": s.get("environment"),
                                "train": " / ".join(s.get("time_blocks", {}).get("train", [])),
                                "test": " / ".join(s.get("time_blocks", {}).get("test", [])),
                                "split_id": s["split_id"]} for s in splits])
    qc_rows = pd.DataFrame([{"city": city, **summary_row(report)} for city, report in sorted(qc.items())])
    tables = Markup()
    if not split_rows.empty:
        tables += _table(split_rows, "Splits (time blocks: UTC, start inclusive / end exclusive)")
    if not qc_rows.empty:
        tables += _table(qc_rows, "Data coverage and quality control per city (from data/qc/*.json)")
    return render(SETUP, facts=facts, tables=tables)


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


GRID = ('<section id="grid"><h2>The grid</h2>'
        "<p>Cells: mean {{ label }} over seeds; {{ change_note }}; the heatmap's colour shows whether that is better "
        "(blue) or worse (red); {{ best }} and a frame mark the best cell of each split. 95% CI over test origins: "
        "moving-block bootstrap of the forecast origins (blocks of at least ceil(horizon / stride) origins, so "
        "overlapping windows stay together; {{ resamples }} resamples), the same blocks for every seed and station. "
        "Spread over seeds: the seed range (min-max) below 3 seeds, a Student t interval from 3 seeds. DM p: "
        "Diebold-Mariano test on paired per-window {{ loss }} errors against the ERM twin (two-sided; Newey-West "
        "variance with ceil(horizon / stride) - 1 Bartlett lags, origins dropped for missing data kept apart; "
        "Harvey-Leybourne-Newbold factor, Student t); DM p, Holm: adjusted over every penalised-vs-ERM comparison "
        "of the grid under this selection rule. Ranks, spread and tests use the headline selection rule; the last "
        "columns give the same cell's mean under each other logged rule.</p>{{ heatmap }}{{ table }}</section>")


def grid_section(summary_all: pd.DataFrame, meta: dict, rule: str, dpi: int, top_rows: int) -> Markup:
    """One grid: the headline rule's heatmap and table; every other rule is a column of that table."""
    summary = summary_all[summary_all["selection_rule"] == rule]
    label = summary["metric_label"].iloc[0]
    loss = summary["dm_loss"].dropna().iloc[0] if summary["dm_loss"].notna().any() else "absolute"
    table, column_rules = other_rule_columns(summary_table(summary, top_rows), summary_all, meta, rule)
    return render(GRID, label=label, change_note=grid_stats.change_note(summary["metric"].iloc[0]),
                  best=figures.BEST_MARK, resamples=meta.get("bootstrap_samples", ""), loss=loss.replace("_", " "),
                  heatmap=_figure(figures.grid_heatmap(summary, rule), dpi,
                                  _rule_caption(f"Grid heatmap of {label}", rule), rule),
                  table=_table(table, _rule_caption(f"Summary per split (best {top_rows} per split)", rule), rule,
                               "grid", column_rules))


RANKS = ('<section id="ranks"><h2>Ranks and critical difference</h2>'
         "{% for each, result, chart in tests %}{% if not result.get('available') %}"
         '<p data-selection="{{ each }}">Friedman test not available under {{ each|rule }}: '
         "{{ result.get('reason', 'no result') }}.</p>"
         '{% else %}<p data-selection="{{ each }}"><strong>{{ each|rule }}</strong>: blocks = {{ result.n_blocks }} '
         "target cities ({{ result.blocks|join(', ') }}; {{ result.n_splits }} splits, those sharing a target "
         "averaged), {{ result.k }} combinations: Friedman chi² = {{ result.chi2|g3 }} (p = {{ result.p_value|g3 }}), "
         "Iman-Davenport F = {{ result.f_stat|g3 }} with ({{ result.f_df[0] }}, {{ result.f_df[1] }}) df, p = "
         "{{ result.f_p_value|g3 }}: {% if result.rejects %}the omnibus test rejects equal mean ranks at alpha "
         "{{ '%g'|format(result.alpha) }}; Nemenyi CD = {{ result.cd|g3 }}{% else %}the omnibus test does not reject "
         "equal mean ranks at alpha {{ '%g'|format(result.alpha) }}, so no critical-difference chart is drawn: the "
         "ranks below are not distinguishable{% endif %}. Combinations left out (missing in some split): "
         "{{ result.dropped_combos|join(', ') or 'none' }}.</p>{{ chart }}{% endif %}{% endfor %}"
         '<p class="note">{{ caveat }}</p>{{ comparison }}</section>')


def ranks_section(summary_all: pd.DataFrame, meta: dict, rule: str, dpi: int) -> Markup:
    """Friedman and Iman-Davenport over target cities; the critical-difference chart only when they reject."""
    label = summary_all["metric_label"].iloc[0]
    tests = []
    for each in meta["rules"]:
        result = meta["friedman"].get(each, {})
        chart = Markup()
        if result.get("available") and result["rejects"] and (each == rule or len(meta["rules"]) == 1):
            chart = _figure(figures.cd_chart(result, each), dpi,
                            _rule_caption(f"Mean ranks over target cities of {label} and Nemenyi critical difference "
                                          f"(alpha {result['alpha']:g})", each), each)
        tests.append((each, result, chart))
    comparison = Markup()
    if len(meta["rules"]) > 1:
        comparison = _figure(figures.selection_comparison(summary_all), dpi,
                             f"{label} under each selection rule: " + "; ".join(selection.label(r) for r in meta["rules"]),
                             selection.PEEK if selection.PEEK in meta["rules"] else None)
    return render(RANKS, tests=tests, caveat=grid_stats.MULTIPLE_COMPARISON_CAVEAT, comparison=comparison)


CURVES = ('<section id="horizon"><h2>Error by horizon and exceedance scores</h2>{{ horizon }}'
          "{% if note %}<p>Exceedance scores count the event of a {{ note }}.</p>{{ exceedance }}{% endif %}</section>")


def curves_section(runs: pd.DataFrame, rule: str, dpi: int) -> Markup:
    variable = str(grid_stats.run_setting(runs, "forecast.target", "forecast.target"))
    step_hours = grid_stats.run_step_hours(runs)  # the cadence names the horizon's unit and the scored event
    horizon = exceedance = Markup()
    note = ""
    if figures.horizon_columns(runs, rule):
        caption = f"{grid_stats.metric_label('target_mae', variable)} per forecast {step_words(step_hours).noun}"
        horizon = _figure(figures.horizon_curves(runs, rule, variable, step_hours), dpi,
                          _rule_caption(caption, rule), rule)
    if any(col.startswith(f"{rule}.target_csi") for col in runs.columns):
        threshold = float(grid_stats.run_setting(runs, "metrics.hourly_exceedance_threshold",
                                                 "metrics.hourly_exceedance_threshold"))
        note = grid_stats.threshold_note(variable, threshold, step_hours)
        exceedance = _figure(figures.exceedance_bars(runs, rule, note), dpi,
                             _rule_caption(f"Exceedance scores (POD, FAR, CSI, ETS); {note}", rule), rule)
    return render(CURVES, horizon=horizon, note=note, exceedance=exceedance)


SHIFT = ('<section id="shift"><h2>Shift diagnostics</h2>{% if figure %}'
         "<p>Energy distance and mean per-variable Wasserstein-1 distance between cities on features standardised "
         "over all cities, next to the distance between city centroids. Right panel: each split's target error "
         "(mean over model+penalty combinations) against the mean shift between its sources and its target; "
         "Spearman rank correlation over {{ n_points }} splits ({{ excluded }} within-city splits left out).</p>"
         "{{ figure }}{{ table }}{% else %}<p>No shift table (fewer than two cities).</p>{% endif %}</section>")


def shift_section(shift: pd.DataFrame | None, summary: pd.DataFrame, rule: str, dpi: int) -> Markup:
    if shift is None or shift.empty:
        return render(SHIFT, figure=None)
    points, rho, p_value = shift_data.error_vs_shift(shift, summary)
    if not points.empty:  # the figure's axis names the metric with its variable and unit
        points["metric"] = summary["metric_label"].iloc[0]
    return render(SHIFT, n_points=len(points), excluded=points.attrs.get("excluded", 0),
                  figure=_figure(figures.shift_figure(shift, points, rule, rho, p_value), dpi,
                                 _rule_caption("Shift diagnostics", rule), rule),
                  table=_table(shift[["city_a", "city_b", "energy_distance", "mean_wasserstein", "geo_km",
                                      "n_rows_a", "n_rows_b"]], "Pairwise city shift (standardised features)"))


PROVENANCE = ('<section id="provenance"><h2>Provenance</h2><p>Every number above is a mean over the runs below; '
              "<code>shiftgrid show RUN_ID</code> prints everything recorded about one run and "
              "<code>shiftgrid verify RUN_ID</code> re-trains it.</p>{{ table }}</section>")


def provenance_section(runs: pd.DataFrame, meta: dict, rule: str) -> Markup:
    column = grid_stats.metric_column(runs.columns, meta["metric"], rule)
    several = "targets" in meta  # several forecast variables: each run's in its own unit
    label = (f"{meta['metric']} of the run's forecast target, in its unit" if several
             else grid_stats.grid_metric_label(runs, column))
    table = pd.DataFrame({"split": [grid_stats.split_label(s, t) for s, t in zip(runs["sources"], runs["target"])],
                          **({"forecast target": runs[target_sections.TARGET_PARAM]} if several else {}),
                          "model": runs["model"], "penalty": runs["penalty"].map(names.penalty_shown),
                          "seed": runs["seed"],
                          f"{label} ({column})": runs[column],
                          "run_id": runs["run_id"],
                          "code": runs.get("tag.code_digest", ""), "commit": runs.get("tag.git.commit", "")})
    table["commit"] = table["commit"].astype(str).str[:10]
    return render(PROVENANCE, table=_table(table, _rule_caption("Runs in the grid", rule), rule, "provenance"))


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


PAGE = ('<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{{ title }}</title>'
        '<meta name="viewport" content="width=device-width, initial-scale=1"><style>{{ css }}</style></head>'
        "<body><main><header><h1>{{ title }}</h1><p class='meta'>metric: {{ label }} · headline selection: "
        "{{ rule|rule }} · generated {{ generated }} UTC</p>"
        '<p class="caution" role="note">{{ caution }}</p></header>'
        '<nav>{% if targets %}<a href="#setup">Setup</a>{% for each in targets %}<a href="#target-{{ each }}">'
        "{{ each }}</a>{% endfor %}{% else %}"
        '<a href="#verdict">Verdict</a><a href="#setup">Setup</a><a href="#grid">Grid</a>'
        '{% if search %}<a href="#search">Search</a>{% endif %}<a href="#ranks">Ranks</a><a href="#horizon">Horizons'
        '</a><a href="#shift">Shift</a>{% endif %}<a href="#provenance">Provenance</a></nav>{{ sections|join }}'
        '<footer><p class="caution">{{ caution }}</p></footer></main></body></html>')


def result_sections(view: targets_html.TargetView, shift, rule: str, dpi: int, top_rows: int,
                    ground_truth: dict | None) -> list[Markup]:
    """The sections of one forecast variable's results: verdict, grid, search, ranks, horizons, shift."""
    summary = view.summary_all[view.summary_all["selection_rule"] == rule]
    return [verdict_section(summary, view.meta, rule, ground_truth),
            grid_section(view.summary_all, view.meta, rule, dpi, top_rows),
            search_section(view.trials, view.runs, view.meta, rule, dpi),  # empty without a search
            ranks_section(view.summary_all, view.meta, rule, dpi), curves_section(view.runs, rule, dpi),
            shift_section(shift, summary, rule, dpi)]


def render_report(grid_dir: Path | str, out_path: Path | str, report_cfg: dict, qc_paths=(), split_paths=(),
                  shift_path: Path | str | None = None, ground_truth: dict | None = None) -> str:
    """Build the page and write it to `out_path`; returns the HTML text. The verdict comes first."""
    runs, summary_all, meta, qc, splits, shift, trials = load_inputs(Path(grid_dir), qc_paths, split_paths,
                                                                     shift_path)
    rule = report_cfg.get("selection", selection.HOLDOUT)
    rule = rule if rule in meta["rules"] else meta["rules"][0]
    dpi, top_rows = int(report_cfg.get("figure_dpi", 100)), int(report_cfg.get("top_rows", 12))
    title = report_cfg.get("title", "shiftgrid comparison")
    label = meta.get("metric_label", meta["metric"])
    views = targets_html.views(runs, summary_all, meta, trials)  # one per forecast variable
    results = [result_sections(view, shift, rule, dpi, top_rows, ground_truth) for view in views]
    setup, provenance = setup_section(meta, runs, qc, splits), provenance_section(runs, meta, rule)
    if len(views) == 1:  # the verdict opens the page
        sections = [results[0][0], setup, *results[0][1:], provenance]
    else:  # a part per forecast variable, each opened by its verdict
        sections = [setup, *(targets_html.part(view.variable, part) for view, part in zip(views, results)), provenance]
    page = str(render(PAGE, title=title, label=label, rule=rule, caution=CAUTION, css=Markup(CSS), sections=sections,
                      search=bool(results[0][2]), targets=[view.variable for view in views if view.variable],
                      generated=f"{dt.datetime.now(dt.timezone.utc):%Y-%m-%d %H:%M}"))
    write_text_atomic(page, out_path)
    return page
