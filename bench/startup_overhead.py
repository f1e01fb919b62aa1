"""Share of a sweep's training wall time spent on process start-up and bookkeeping.

Run after `make demo` (or any `shiftgrid run`): `python bench/startup_overhead.py [results_dir]`.
Reads the Snakemake benchmark files of every train_model / fit_baselines job (wall seconds of the whole
job process) and, from MLflow, each run's `compute_seconds` (fits, refits, evaluation) and
`prepare_seconds` (reading Parquet and building windows, once per split in a job); for a searched run, of
each trial that the job trained. Overhead = job wall time minus that work: interpreter start, imports,
MLflow connection, logging, artifacts. Prints the ratio; the goal
in the issue is < 15 % of the sweep's wall time. Never fails on timings.
"""

import json
import sys
from pathlib import Path

import pandas as pd


def job_walls(results: Path) -> dict[str, float]:
    walls = {}
    for path in (results / "benchmarks").rglob("*.tsv"):
        job = str(path.relative_to(results / "benchmarks").with_suffix(""))
        walls[job] = float(pd.read_csv(path, sep="\t")["s"].iloc[0])
    return walls


def job_compute(results: Path) -> dict[str, float]:
    from pipeline.tracking import client_for

    compute: dict[str, float] = {}
    prepare: dict[str, float] = {}
    clients = {}
    for record_path in (results / "runs").rglob("*.json"):
        record = json.loads(record_path.read_text())
        if record.get("reused"):  # reused from an earlier job: no work was done for it in this one
            continue
        client = clients.setdefault(record["tracking_uri"], client_for(record["tracking_uri"]))
        if record["penalty"] == "na":
            job = f"fit_baselines/{record['split_id']}"  # one job per split fits its baselines
        else:
            job = f"train_model/{record['split_id']}/{record['model']}"
        # a searched run's work is in its trials (those trained in this job); its parent only copies results
        trained = [t["run_id"] for t in record["search"]["trials"] if not t["reused"]] if "search" in record \
            else [record["run_id"]]
        for run_id in trained:
            metrics = client.get_run(run_id).data.metrics
            compute[job] = compute.get(job, 0.0) + metrics.get("compute_seconds", 0.0)
            # data preparation happens once per split (and forecast variable) inside a job
            key = (job, record["split_id"])
            prepare[key] = max(prepare.get(key, 0.0), metrics.get("prepare_seconds", 0.0))
    return {job: compute[job] + sum(v for (j, _), v in prepare.items() if j == job) for job in compute}


def main() -> None:
    results = Path(sys.argv[1] if len(sys.argv) > 1 else "results")
    walls, work = job_walls(results), job_compute(results)
    jobs = sorted(set(walls) & set(work))
    if not jobs:
        print(f"no finished training jobs with benchmarks under {results}; run `make demo` first")
        return
    wall = sum(walls[j] for j in jobs)
    useful = sum(min(work[j], walls[j]) for j in jobs)
    overhead = wall - useful
    print(f"training jobs: {len(jobs)}")
    print(f"job wall time (sum):      {wall:9.1f} s")
    print(f"compute (fit/eval/data):  {useful:9.1f} s")
    print(f"start-up + bookkeeping:   {overhead:9.1f} s")
    print(f"overhead share of wall:   {overhead / wall:9.1%}   (goal: < 15%)")
    per_job = overhead / len(jobs)
    print(f"overhead per job:         {per_job:9.2f} s")


if __name__ == "__main__":
    main()
