# shiftgrid DAG: raw station dumps -> clean Parquet -> splits -> trained runs (MLflow) -> grid and report.
# Configuration comes from Hydra (config/); pass overrides with
#   snakemake --config overrides="experiment=demo model=lstm,gru penalty.weight=100"
# The plan (cities, splits, jobs, each job's config slice) is computed once here, from config only.

import os

from pipeline.workflow import plan_workflow

PLAN = plan_workflow(config.get("overrides"), os.getcwd())  # the project folder (--directory)
RESULTS = PLAN.results_dir


wildcard_constraints:
    city=r"[a-z][a-z0-9]*",
    split_id=r"[a-z0-9+\-]+",
    model=r"[a-z][a-z0-9_]*",
    seed=r"\d+",
    variable=r"[a-z][a-z0-9_]*",  # forecast variable, in paths only when the sweep has several


include: "pipeline/rules/ingest.smk"
include: "pipeline/rules/splits.smk"
include: "pipeline/rules/train.smk"
include: "pipeline/rules/aggregate.smk"


rule all:
    input:
        f"{RESULTS}/grid.csv",
        f"{RESULTS}/report.html",
