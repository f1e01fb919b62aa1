"""Rule build_split: split plan + clean tables -> results/splits/<split_id>.json (time blocks, digests)."""

import json

from pipeline.scripts._step import run_step
from pipeline.splits import build_split, write_split


def work(snakemake):
    plan = json.loads(snakemake.params.plan)
    clean_paths = {city: str(path) for city, path in snakemake.input.items()}
    record = build_split(plan, clean_paths, snakemake.params.lookback, snakemake.params.horizon)
    write_split(record, snakemake.output[0])


run_step(snakemake, work)  # noqa: F821
