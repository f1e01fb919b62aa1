"""`shiftgrid grid [OVERRIDES...] [--target T] [--model M] [--penalty P] [--metric NAME] [--selection RULE]
[--format F]`.

Reads results/grid.parquet (one row per run; no MLflow needed) and results/grid_dm.csv (Diebold-Mariano
tests, when present); prints the ranked grid as a table readable at 100 columns (best cell per split
marked with `*`, not colour), CSV, Markdown or JSON. Config keys obeyed: results_dir, report.metric,
report.selection, report.bootstrap_samples, report.top_rows (for `top_of_grid`).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline import grid_stats, selection
from pipeline.errors import InputError

BEST = "*"
FORMATS = ("table", "csv", "markdown", "json")
COLUMNS = ["split", "best", "model", "penalty", "mean", "std", "n_seeds", "ci_low", "ci_high", "rank",
           "mean_rank", "vs_erm_change", "vs_erm_wins", "vs_erm_ties", "vs_erm_losses", "dm_p", "dm_fallback",
           "run_ids"]


def _csv_list(text: str | None) -> list[str] | None:
    return [item.strip() for item in text.split(",") if item.strip()] if text else None


def add_arguments(parser) -> None:
    parser.add_argument("overrides", nargs="*", help="Hydra overrides, as for `run`, e.g. experiment=demo")
    parser.add_argument("--results", help="results folder (default: results_dir of the config)")
    parser.add_argument("--target", help="only these target cities (comma-separated)")
    parser.add_argument("--model", help="only these models (comma-separated)")
    parser.add_argument("--penalty", help="only these penalties (comma-separated; n/a for baselines)")
    parser.add_argument("--metric", help="any logged metric: mae, rmse, mase, csi, target_mae_h06, ... "
                                         "(default: report.metric)")
    parser.add_argument("--selection", choices=selection.RULES, help="selection rule (default: report.selection)")
    parser.add_argument("--format", choices=FORMATS, default="table")


def load_runs(results_dir: Path) -> pd.DataFrame:
    path = Path(results_dir) / "grid.parquet"
    if not path.exists():
        raise InputError("no grid yet; run the pipeline first (`shiftgrid run`)", file=str(path))
    return pd.read_parquet(path)


def grid_table(results_dir: Path, metric: str, rule: str, n_boot: int = 2000, targets=None, models=None,
               penalties=None) -> pd.DataFrame:
    """The summary (pipeline.grid_stats.summarise) of the filtered runs, DM columns joined in."""
    runs = load_runs(results_dir)
    penalties = [grid_stats.NOT_APPLICABLE if p == "n/a" else p for p in penalties] if penalties else None
    for column, wanted in (("target", targets), ("model", models), ("penalty", penalties)):
        if wanted:
            unknown = sorted(set(wanted) - set(runs[column]))
            if unknown:
                raise InputError(f"no run has {column} {unknown}; known: {', '.join(sorted(runs[column].unique()))}",
                                 field=f"--{column}")
            runs = runs[runs[column].isin(wanted)]
    summary = grid_stats.summarise(runs, metric, rule, n_boot=n_boot)
    dm_path = Path(results_dir) / "grid_dm.csv"
    if dm_path.exists():
        dm = pd.read_csv(dm_path)
        summary = summary.merge(dm[dm["selection_rule"] == rule], how="left",
                                on=["split_id", "model", "penalty", "selection_rule"])
    for column in ("dm_p", "dm_fallback"):
        if column not in summary.columns:
            summary[column] = np.nan
    summary["best"] = np.where(summary["best_in_split"], BEST, "")
    summary["penalty"] = summary["penalty"].map(grid_stats.penalty_display)
    return summary.sort_values(["split", "rank", "model"]).reset_index(drop=True)


def _num(value, spec: str = ".3g") -> str:
    return format(value, spec) if isinstance(value, (int, float, np.number)) and np.isfinite(value) else "-"


def format_table(summary: pd.DataFrame) -> str:
    """Fixed-width text, one block per split, lines under 100 characters."""
    metric, rule = summary["metric"].iloc[0], summary["selection_rule"].iloc[0]
    lines = [f"metric: {metric} ({grid_stats.direction_text(metric)}); selection: {selection.label(rule)}",
             f"{BEST} = best in split; n = seeds; mrank = mean rank over splits",
             "vs ERM = change of the mean against the ERM twin; W/T/L over splits;",
             "DM p = Diebold-Mariano test with HLN correction against the ERM twin, + = h=1 fallback"]
    header = f"  {'':1} {'model':<14} {'penalty':<8} {'mean':>8} {'std':>7} {'n':>2} {'95% CI':>17} " \
             f"{'rank':>4} {'mrank':>5} {'vs ERM':>7} {'W/T/L':>6} {'DM p':>8}"
    for split, group in summary.groupby("split", sort=True):
        lines += ["", f"{split}  [{group['split_id'].iloc[0]}]"[:100], header]
        for row in group.itertuples():
            ci = f"[{_num(row.ci_low)}, {_num(row.ci_high)}]"
            change = f"{row.vs_erm_change * 100:+.1f}%" if np.isfinite(row.vs_erm_change) else "-"
            wtl = (f"{row.vs_erm_wins:.0f}/{row.vs_erm_ties:.0f}/{row.vs_erm_losses:.0f}"
                   if np.isfinite(row.vs_erm_wins) else "-")
            dm = _num(row.dm_p) + ("+" if row.dm_fallback is True else "")
            lines.append(f"  {row.best:1} {row.model[:14]:<14} {row.penalty[:8]:<8} {_num(row.mean, '.4g'):>8} "
                         f"{_num(row.std):>7} {row.n_seeds:>2} {ci[:17]:>17} {row.rank:>4.1f} {row.mean_rank:>5.2f} "
                         f"{change:>7} {wtl:>6} {dm:>8}")
    return "\n".join(lines)


def format_markdown(summary: pd.DataFrame) -> str:
    table = summary[COLUMNS[:-1]]
    head = "| " + " | ".join(table.columns) + " |"
    rule = "|" + "|".join("---" for _ in table.columns) + "|"
    rows = ["| " + " | ".join(_num(v, ".4g") if isinstance(v, float) else str(v) for v in row) + " |"
            for row in table.itertuples(index=False)]
    label = selection.label(summary["selection_rule"].iloc[0])
    return "\n".join([f"Selection: {label}; metric: {summary['metric'].iloc[0]}", "", head, rule, *rows])


def render(summary: pd.DataFrame, fmt: str) -> str:
    if fmt == "table":
        return format_table(summary)
    if fmt == "markdown":
        return format_markdown(summary)
    out = summary[["selection_rule", "selection_label", "metric", "split_id", *COLUMNS]]
    if fmt == "csv":
        return out.to_csv(index=False).rstrip("\n")
    return json.dumps(json.loads(out.to_json(orient="records")), indent=1)


def _config(root: Path, overrides: list[str]):
    from pipeline.config import compose_config, expand_sweep_overrides

    if not (Path(root) / "config").exists():
        return None
    return compose_config(expand_sweep_overrides(list(overrides)), root)


def run(args) -> int:
    root = Path(args.root)
    cfg = _config(root, args.overrides)
    results = Path(args.results) if args.results else root / (cfg.results_dir if cfg else "results")
    metric = args.metric or (cfg.report.metric if cfg else "mae")
    rule = args.selection or (cfg.report.selection if cfg else selection.HOLDOUT)
    n_boot = int(cfg.report.bootstrap_samples) if cfg else 2000
    summary = grid_table(results, metric, rule, n_boot, _csv_list(args.target), _csv_list(args.model),
                         _csv_list(args.penalty))
    print(render(summary, args.format))
    return 0


def top_of_grid(results_dir: Path, cfg) -> str:
    """A few lines for the end of `make demo`: combinations by mean rank, best cell per split, Friedman."""
    metric, rule = cfg.report.metric, cfg.report.selection
    summary = grid_table(Path(results_dir), metric, rule, int(cfg.report.bootstrap_samples))
    board = summary.groupby("combo").agg(mean_rank=("mean_rank", "first"), average=("mean", "mean"))
    board = board.sort_values("mean_rank").head(int(cfg.report.top_rows))
    lines = [f"top of the grid — {summary['metric'].iloc[0]} ({grid_stats.direction_text(metric)}), "
             f"selection: {selection.label(rule)}", f"  {'model+penalty':<28} {'mean rank':>9} {'mean':>10}"]
    lines += [f"  {name[:28]:<28} {row.mean_rank:>9.2f} {row.average:>10.4g}" for name, row in board.iterrows()]
    lines.append("best per split:")
    for split, group in summary[summary["best_in_split"]].groupby("split", sort=True):
        lines.append(f"  {BEST} {split}: {', '.join(group['combo'])} ({_num(group['mean'].iloc[0], '.4g')})")
    meta_path = Path(results_dir) / "grid_meta.json"
    if meta_path.exists():
        result = json.loads(meta_path.read_text()).get("friedman", {}).get(rule, {})
        if result.get("available"):
            lines.append(f"Friedman p = {result['p_value']:.3g} over {result['n_splits']} splits, "
                         f"Nemenyi CD = {result['cd']:.2f} (see the report for the caveats)")
    return "\n".join(lines)
