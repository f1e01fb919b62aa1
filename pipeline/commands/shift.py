"""`shiftgrid shift [OVERRIDES...] [--measure M] [--format table|csv|json]`: pairwise city shift diagnostics.

Reads the clean Parquet tables (data.clean_dir), the station table (data.stations) and, when present,
results/grid.parquet for the rank correlation between target error and source-target shift. Prints;
writes nothing. Config keys obeyed: data.clean_dir, data.stations, forecast.exclude_features,
results_dir, report.metric, report.selection, report.bootstrap_samples.
"""

from __future__ import annotations

import json
from pathlib import Path

from pipeline import selection
from pipeline.report import shift_data
from pipeline.workflow import plan_workflow


def add_arguments(parser) -> None:
    parser.add_argument("overrides", nargs="*", help="Hydra overrides, e.g. experiment=demo")
    parser.add_argument("--measure", choices=shift_data.SHIFT_MEASURES, default="energy_distance",
                        help="shift measure for the rank correlation with target error")
    parser.add_argument("--format", choices=("table", "csv", "json"), default="table")


def run(args) -> int:
    root = Path(args.root)
    plan = plan_workflow(args.overrides, root)  # the study's cities (split.cities restricts them)
    cfg = plan.cfg
    stations_path = root / cfg.data.stations
    clean = {city: root / plan.clean_path(city) for city in plan.cities}
    shift = shift_data.compute_shift(clean, stations_path, exclude=list(cfg.forecast.exclude_features))
    correlation = None
    grid_path = root / cfg.results_dir / "grid.parquet"
    if grid_path.exists():
        from pipeline.commands.grid import grid_table

        summary = grid_table(root / cfg.results_dir, cfg.report.metric, cfg.report.selection)
        points, rho, p_value = shift_data.error_vs_shift(shift, summary, args.measure)
        correlation = {"measure": args.measure, "metric": summary["metric"].iloc[0], "rho": rho, "p_value": p_value,
                       "n_splits": len(points), "selection": selection.label(cfg.report.selection),
                       "within_city_splits_left_out": points.attrs.get("excluded", 0)}
    if args.format == "csv":
        print(shift.to_csv(index=False).rstrip("\n"))
    elif args.format == "json":
        print(json.dumps({"pairs": json.loads(shift.to_json(orient="records")), "error_vs_shift": correlation},
                         indent=1))
    else:
        print(format_table(shift, correlation))
    return 0


def format_table(shift, correlation: dict | None) -> str:
    lines = ["pairwise city shift on standardised features: energy distance, mean Wasserstein-1, km",
             f"  {'city A':<14} {'city B':<14} {'energy':>8} {'wasserst.':>9} {'km':>8} {'rows A':>8} {'rows B':>8}"]
    for row in shift.sort_values("energy_distance").itertuples():
        lines.append(f"  {row.city_a[:14]:<14} {row.city_b[:14]:<14} {row.energy_distance:>8.3f} "
                     f"{row.mean_wasserstein:>9.3f} {row.geo_km:>8.1f} {row.n_rows_a:>8} {row.n_rows_b:>8}")
    if correlation is None:
        lines.append("no grid yet: run the pipeline to relate target error to shift")
    else:
        lines.append(f"Spearman rho, {correlation['metric']} (mean over model+penalty) vs mean "
                     f"source-target {correlation['measure']}:")
        lines.append(f"  {correlation['rho']:.3f} (p = {correlation['p_value']:.3g}, {correlation['n_splits']} "
                     f"splits; selection: {correlation['selection']})")
    return "\n".join(lines)
