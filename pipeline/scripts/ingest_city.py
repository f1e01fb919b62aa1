"""Rule ingest_city: raw dump of one city -> data/clean/<city>.parquet + data/qc/<city>.json."""

import json

from pipeline.ingest import run_ingest
from pipeline.scripts._step import run_step


def work(snakemake):
    run_ingest(snakemake.wildcards.city, json.loads(snakemake.params.city_format), snakemake.params.raw_dir,
               snakemake.input.stations, snakemake.output.clean, snakemake.output.qc,
               snakemake.params.reference_temperature_c)


run_step(snakemake, work)  # noqa: F821 (injected by Snakemake)
