"""Rule aggregate_grid: run records + MLflow -> results/grid.parquet, grid.csv, grid_dm.csv, grid_intervals.csv,
grid_trials.csv, grid_meta.json."""

import json
from pathlib import Path

from pipeline.aggregate import aggregate
from pipeline.scripts._step import run_step


def work(snakemake):
    report = json.loads(snakemake.params.report)
    meta = aggregate(list(snakemake.input.records), Path(snakemake.output.runs).parent,
                     metric=report["metric"], n_boot=int(report["bootstrap_samples"]))
    print(f"grid: {meta['n_runs']} runs of {meta['n_records']} records; skipped: "
          f"{ {k: v['count'] for k, v in meta['skipped'].items()} or 'none'}")


run_step(snakemake, work)  # noqa: F821
