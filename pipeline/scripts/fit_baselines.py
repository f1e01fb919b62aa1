"""Rule fit_baselines: the closed-form families of one split -> MLflow runs + run records (output order).

Reads that split's record and the clean tables of its cities only, so new data for one city re-runs the
baselines of its splits and no other. With several forecast variables the units are grouped by variable
(one window set each); every group goes through the same training job code as train_model, with
unchanged runs reused from MLflow.
"""

import json

from pipeline.scripts._step import run_step
from pipeline.store_check import store_errors
from pipeline.train_job import run_train_job


def work(snakemake):
    tracking = json.loads(open(snakemake.input.tracking).read())
    clean_paths = {k: str(v) for k, v in snakemake.input.items() if k not in ("split", "tracking")}
    units = json.loads(snakemake.params.units)
    outputs = list(snakemake.output)
    by_variable: dict[str, list[int]] = {}
    for index, unit in enumerate(units):
        by_variable.setdefault(unit["job"]["forecast"]["target"], []).append(index)
    for indices in by_variable.values():
        with store_errors(tracking["tracking_uri"]):  # a failing store ends the job in one line
            run_train_job(snakemake.input.split, [units[i] for i in indices], [outputs[i] for i in indices],
                          tracking["tracking_uri"], tracking["experiment"], snakemake.params.code,
                          clean_paths=clean_paths)


run_step(snakemake, work)  # noqa: F821
