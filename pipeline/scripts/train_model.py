"""Rule train_model: every run of one job -> MLflow runs + run records (output order)."""

import json

from pipeline.scripts._step import run_step
from pipeline.store_check import store_errors
from pipeline.train_job import run_train_job


def work(snakemake):
    tracking = json.loads(open(snakemake.input.tracking).read())
    clean_paths = {k: str(v) for k, v in snakemake.input.items() if k not in ("split", "tracking")}
    with store_errors(tracking["tracking_uri"]):  # a failing store ends the job in one line, no record written
        run_train_job(snakemake.input.split, json.loads(snakemake.params.units), list(snakemake.output),
                      tracking["tracking_uri"], tracking["experiment"], snakemake.params.code,
                      clean_paths=clean_paths)


run_step(snakemake, work)  # noqa: F821
