"""Rule render_report: grid tables + shift + QC reports + split records -> results/report.html."""

import json
from pathlib import Path

from pipeline.report.html import render_report
from pipeline.scripts._step import run_step


def work(snakemake):
    render_report(Path(snakemake.input.runs).parent, snakemake.output[0], json.loads(snakemake.params.report),
                  qc_paths=list(snakemake.input.qc), split_paths=list(snakemake.input.splits),
                  shift_path=snakemake.input.shift, ground_truth=json.loads(snakemake.params.ground_truth))
    print(f"report: {snakemake.output[0]}")


run_step(snakemake, work)  # noqa: F821
