"""Rule fit_baselines: the closed-form families on every split -> MLflow runs + run records.

Units are grouped by split and forecast variable; each group's units go through the same training job code as train_model,
with unchanged runs reused (so new data for one city retrains only the baselines of its splits).
"""

import json
from pathlib import Path

from pipeline.scripts._step import run_step
from pipeline.store_check import store_errors
from pipeline.train_job import run_train_job


def work(snakemake):
    tracking = json.loads(open(snakemake.input.tracking).read())
    units = json.loads(snakemake.params.units)
    outputs = list(snakemake.output)
    by_split: dict[tuple, list[int]] = {}  # one window set per split and forecast variable
    for index, unit in enumerate(units):
        by_split.setdefault((unit["split_id"], unit["job"]["forecast"]["target"]), []).append(index)
    for (split_id, _), indices in by_split.items():
        split_path = Path(snakemake.params.results) / "splits" / f"{split_id}.json"
        with store_errors(tracking["tracking_uri"]):  # a failing store ends the job in one line
            run_train_job(split_path, [units[i] for i in indices], [outputs[i] for i in indices],
                          tracking["tracking_uri"], tracking["experiment"], snakemake.params.code)


run_step(snakemake, work)  # noqa: F821
