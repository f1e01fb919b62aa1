"""`shiftgrid grid [OVERRIDES...] [--target T] [--variable V] [--model M] [--penalty P] [--metric NAME]
[--selection RULE] [--format F]`.

Reads results/grid.parquet (one row per run; no MLflow needed), results/grid_dm.csv (Diebold-Mariano
tests with Holm-adjusted p) and results/grid_intervals.csv (block-bootstrap intervals over test origins),
when present; prints the ranked grid as a table readable at 100 columns (best cell per split
marked with `*`, not colour), CSV, Markdown or JSON. Config keys obeyed: results_dir, report.metric,
report.selection, report.top_rows (for `top_of_grid`). A sweep over several forecast variables shows one
grid per variable (pipeline.target_sections), each with its own ranks and units.
"""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline import grid_stats, names, selection, target_sections
from pipeline.commands import add_run_filters
from pipeline.errors import InputError
from pipeline.resampling import SEED_RANGE

BEST = "*"
FORMATS = ("table", "csv", "markdown", "json")
COLUMNS = ["split", "best", "model", "penalty", "metric_label", "mean", "std", "n_seeds", "ci_low", "ci_high",
           "ci_block", "seed_low", "seed_high", "seed_interval", "rank", "mean_rank", "vs_erm_change", "vs_erm_wins",
           "vs_erm_ties", "vs_erm_losses", "dm_loss", "dm_p", "dm_p_holm", "dm_mean_diff", "run_ids"]
WIDTH = 100


def _csv_list(text: str | None) -> list[str] | None:
    return [item.strip() for item in text.split(",") if item.strip()] if text else None


def add_arguments(parser) -> None:
    parser.add_argument("overrides", nargs="*", help="Hydra overrides, as for `run`, e.g. experiment=demo")
    parser.add_argument("--results", help="results folder (default: results_dir of the config)")
    add_run_filters(parser, several=True)
    parser.add_argument("--metric", help="any logged metric: mae, rmse, mase, csi, target_mae_h06, ... "
                                         "(default: report.metric)")
    parser.add_argument("--selection", choices=selection.RULES, help="selection rule (default: report.selection)")
    parser.add_argument("--format", choices=FORMATS, default="table")


def load_runs(results_dir: Path) -> pd.DataFrame:
    path = Path(results_dir) / "grid.parquet"
    if not path.exists():
        raise InputError("no grid yet; run the pipeline first (`shiftgrid run`)", file=str(path))
    return pd.read_parquet(path)


def grid_table(results_dir: Path, metric: str, rule: str, targets=None, models=None,
               penalties=None, variables=None) -> pd.DataFrame:
    """The summary (pipeline.grid_stats.summarise) of the filtered runs, DM columns joined in."""
    runs = load_runs(results_dir)
    penalties = [names.penalty_label(p) for p in penalties] if penalties else None
    filters = (("target", "target", targets), ("variable", target_sections.TARGET_PARAM, variables),
               ("model", "model", models), ("penalty", "penalty", penalties))
    for option, column, wanted in filters:
        if wanted:
            known = set(runs[column].dropna().astype(str)) if column in runs.columns else set()
            unknown = sorted(set(wanted) - known)
            if unknown:
                raise InputError(f"no run has {option} {unknown}; known: {', '.join(sorted(known)) or 'none'}",
                                 field=f"--{option}")
            runs = runs[runs[column].isin(wanted)]
    # Tests and intervals were computed by the aggregation over the WHOLE grid (the Holm family is every
    # comparison of the grid, whatever this view filters), so they are read, never recomputed here.
    paths = {name: Path(results_dir) / f"grid_{name}.csv" for name in ("dm", "intervals")}
    tables = {name: pd.read_csv(path) if path.exists() else None for name, path in paths.items()}
    sections = []
    for variable, section in target_sections.run_sections(runs):  # one grid per forecast variable
        # one variable picked by --variable reads as a single grid, but only its own rows of the tests
        tested = variable or (variables[0] if variables else None)
        summary = grid_stats.summarise(section, metric, rule)
        summary = grid_stats.attach_tests(summary, target_sections.part_of(tables["dm"], tested),
                                          target_sections.part_of(tables["intervals"], tested))
        sections.append(target_sections.labelled(summary, variable))
    summary = pd.concat(sections, ignore_index=True)
    summary["best"] = np.where(summary["best_in_split"], BEST, "")
    summary["penalty"] = summary["penalty"].map(names.penalty_shown)
    order = [c for c in (target_sections.TARGET_COLUMN, "split", "rank", "model") if c in summary.columns]
    return summary.sort_values(order).reset_index(drop=True)


def _num(value, spec: str = ".3g") -> str:
    return format(value, spec) if isinstance(value, (int, float, np.number)) and np.isfinite(value) else "-"


def _fit(text: str) -> list[str]:
    """A header sentence wrapped to the table width."""
    return textwrap.wrap(text, WIDTH, subsequent_indent="  ") or [""]


def _seed_text(row) -> str:
    if not np.isfinite(row.seed_low):
        return "-"
    return f"[{_num(row.seed_low)}, {_num(row.seed_high)}]" + ("" if row.seed_interval == SEED_RANGE else "t")


def format_table(summary: pd.DataFrame) -> str:
    """Fixed-width text, one block per split (under a heading per forecast variable when there are
    several), lines of at most 100 characters."""
    parts = target_sections.table_sections(summary)
    if len(parts) == 1:
        return _format_section(summary)
    note = "each forecast target is its own grid: its ranks, tests and Holm family stay within it"
    return "\n\n".join(f"== forecast target {variable} ==\n{note}\n" + _format_section(part)
                       for variable, part in parts)


def _format_section(summary: pd.DataFrame) -> str:
    """One forecast variable's grid: its metric (and unit) in the heading, then a block per split."""
    metric, rule = summary["metric"].iloc[0], summary["selection_rule"].iloc[0]
    lines = _fit(f"selection: {selection.label(rule)}; metric: {summary['metric_label'].iloc[0]} "
                 f"({grid_stats.direction_text(metric)})")
    lines += [f"{BEST} = best in split; n = seeds; rank within the split",
              "95% CI = moving-block bootstrap over test origins (blocks >= horizon / stride origins)",
              "seeds = seed range (min-max) below 3 seeds; t = 95% CI over seeds (Student t) from 3 seeds",
              "vs ERM = (penalty - ERM) / |ERM| of the means, %: negative = the penalty lowered the metric",
              "W/T/L over splits (tie within 1 %); Holm p = Diebold-Mariano (HLN, Newey-West lags",
              "  ceil(horizon / stride) - 1) vs the ERM twin, Holm-adjusted over the whole grid's comparisons"]
    header = f"  {'':1} {'model':<12} {'penalty':<7} {'mean':>8} {'n':>2} {'95% CI':>15} {'seeds':>15} " \
             f"{'rank':>4} {'vs ERM':>7} {'W/T/L':>6} {'Holm p':>8}"
    for split, group in summary.groupby("split", sort=True):
        lines += ["", f"{split}  [{group['split_id'].iloc[0]}]"[:WIDTH], header]
        for row in group.itertuples():
            ci = f"[{_num(row.ci_low)}, {_num(row.ci_high)}]" if np.isfinite(row.ci_low) else "-"
            wtl = (f"{row.vs_erm_wins:.0f}/{row.vs_erm_ties:.0f}/{row.vs_erm_losses:.0f}"
                   if np.isfinite(row.vs_erm_wins) else "-")
            lines.append(f"  {row.best:1} {row.model[:12]:<12} {row.penalty[:7]:<7} {_num(row.mean, '.4g'):>8} "
                         f"{row.n_seeds:>2} {ci[:15]:>15} {_seed_text(row)[:15]:>15} {row.rank:>4.1f} "
                         f"{grid_stats.format_change(row.vs_erm_change):>7} {wtl:>6} {_num(row.dm_p_holm):>8}")
    return "\n".join(lines)


def format_markdown(summary: pd.DataFrame) -> str:
    parts = target_sections.table_sections(summary)
    if len(parts) > 1:
        return "\n\n".join(f"### Forecast target {variable}\n\n" + format_markdown(part.drop(
            columns=target_sections.TARGET_COLUMN)) for variable, part in parts)
    table = summary[COLUMNS[:-1]]
    head = "| " + " | ".join(table.columns) + " |"
    rule = "|" + "|".join("---" for _ in table.columns) + "|"
    rows = ["| " + " | ".join(_num(v, ".4g") if isinstance(v, float) else str(v) for v in row) + " |"
            for row in table.itertuples(index=False)]
    label = selection.label(summary["selection_rule"].iloc[0])
    notes = (f"Selection: {label}; metric: {summary['metric_label'].iloc[0]}; {grid_stats.CHANGE_NOTE}; seed_interval "
             "names the seed spread; ci = moving-block bootstrap over test origins; dm_p_holm = Holm-adjusted")
    return "\n".join([notes, "", head, rule, *rows])


def render(summary: pd.DataFrame, fmt: str) -> str:
    if fmt == "table":
        return format_table(summary)
    if fmt == "markdown":
        return format_markdown(summary)
    shown = [c for c in (target_sections.TARGET_COLUMN,) if c in summary.columns]
    out = summary[[*shown, "selection_rule", "selection_label", "metric", "split_id", *COLUMNS]]
    if fmt == "csv":
        return out.to_csv(index=False).rstrip("\n")
    return json.dumps(json.loads(out.to_json(orient="records")), indent=1)


def _config(root: Path, overrides: list[str]):
    from pipeline.workflow import plan_config  # the cached plan's config when there is one: no Hydra

    if not (Path(root) / "config").exists():
        return None
    return plan_config(list(overrides), root)


def run(args) -> int:
    root = Path(args.root)
    cfg = _config(root, args.overrides)
    results = Path(args.results) if args.results else root / (cfg.results_dir if cfg else "results")
    metric = args.metric or (cfg.report.metric if cfg else "mae")
    rule = args.selection or (cfg.report.selection if cfg else selection.HOLDOUT)
    summary = grid_table(results, metric, rule, _csv_list(args.target), _csv_list(args.model),
                         _csv_list(args.penalty), _csv_list(args.variable))
    print(render(summary, args.format))
    return 0


def top_of_grid(results_dir: Path, cfg) -> str:
    """A few lines for the end of `make demo`: combinations by mean rank, best cell per split, Friedman
    (for each forecast variable when there are several)."""
    metric, rule = cfg.report.metric, cfg.report.selection
    summary = grid_table(Path(results_dir), metric, rule)
    meta_path = Path(results_dir) / "grid_meta.json"
    meta = json.loads(meta_path.read_text()) if meta_path.exists() else {}
    return "\n".join(_top_section(part, meta.get("targets", {}).get(variable, meta), metric, rule, cfg)
                     for variable, part in target_sections.table_sections(summary))


def _top_section(summary: pd.DataFrame, meta: dict, metric: str, rule: str, cfg) -> str:
    board = summary.groupby("combo").agg(mean_rank=("mean_rank", "first"), average=("mean", "mean"))
    board = board.sort_values("mean_rank").head(int(cfg.report.top_rows))
    lines = [f"top of the grid — {summary['metric_label'].iloc[0]} ({grid_stats.direction_text(metric)}), "
             f"selection: {selection.label(rule)}", f"  {'model+penalty':<28} {'mean rank':>9} {'mean':>10}"]
    lines += [f"  {name[:28]:<28} {row.mean_rank:>9.2f} {row.average:>10.4g}" for name, row in board.iterrows()]
    lines.append("best per split:")
    for split, group in summary[summary["best_in_split"]].groupby("split", sort=True):
        lines.append(f"  {BEST} {split}: {', '.join(group['combo'])} ({_num(group['mean'].iloc[0], '.4g')})")
    result = meta.get("friedman", {}).get(rule, {})
    if result.get("available"):
        outcome = (f"Nemenyi CD = {result['cd']:.2f}" if result["rejects"]
                   else f"ranks not distinguishable at alpha {result['alpha']:g}")
        lines.append(f"Friedman over {result['n_blocks']} target cities: Iman-Davenport p = "
                     f"{result['f_p_value']:.3g}, {outcome} (see the report for the caveats)")
    return "\n".join(lines)
