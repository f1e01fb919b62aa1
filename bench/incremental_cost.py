"""What new data for one city costs: the re-run's wall time beside the share of jobs that truly involve it.

    .venv/bin/python bench/incremental_cost.py [--days 10] [--city arlenvik] [--keep DIR]

In a temporary project (tests/project_copy.py, with its own copy of the package, so that edits to the
checkout meanwhile cannot re-run anything) with the demo's six invented cities, a cheap study (12
one-source-city pairs: each city the source of two and the target of two; persistence + ridge + linear,
ERM, seed 0, 30 steps), through the project's own CLI: `shiftgrid demo` writes the raw dumps, `shiftgrid run` runs the full sweep (timed),
then one city gets new data (its last day of rows appended again, one day later, as a new delivery would),
`shiftgrid status` says why, and `shiftgrid run` runs again (timed).

The share of jobs that truly involve the city, from the plan (pipeline.workflow): its ingestion job (one
of six), the split, training and baselines jobs of every split that uses it as a source or the target,
and the three aggregation jobs (they read every split), over every job of the full sweep. Goal (issue):
re-run wall / full-sweep wall within 1.2 x that share. Also printed: the jobs Snakemake scheduled for the
re-run (its dry run's job stats) beside those the share counts, so a re-run that re-executes more than it
should shows which rule does. A re-run pays Snakemake's start-up and DAG building twice (ingestion, then
the rest) like the full sweep does; on a study this small that fixed cost is a visible part of the
ratio. Never fails on timings.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "tests"))
sys.path.insert(0, str(REPO))

CITIES = ("arlenvik", "brumeholt", "corvessa", "dunmarrow", "elsquay", "fenlowe")  # config/data/demo.yaml
AGGREGATION_RULES = ("aggregate_grid", "diagnose_shift", "render_report")


def write_study(project: Path, days: int) -> list[str]:
    pairs = "".join(f"    - {{sources: [{source}], target: {CITIES[(i + step) % len(CITIES)]}}}\n"
                    for i, source in enumerate(CITIES) for step in (1, 2))
    text = ("# @package _global_\n"
            f"data:\n  generator:\n    days: {days}\n"
            f"split:\n  schemes: [pairs]\n  cities: [{', '.join(CITIES)}]\n  pairs:\n{pairs}"
            "  environment_fallback: station\n"
            "forecast:\n  lookback_hours: 24\n  horizon_hours: 6\n  stride_hours: 2\n"
            "sweep:\n  models: [persistence, ridge, linear]\n  penalties: [erm]\n  seeds: [0]\n"
            "fit:\n  max_steps: 30\n  eval_every: 10\n  batch_size: 64\n"
            "penalty:\n  warmup_steps: 10\n"
            "report:\n  bootstrap_samples: 200\n"
            "tracking:\n  experiment: shiftgrid-incremental\n")
    (project / "config" / "experiment" / "incremental.yaml").write_text(text)
    return ["experiment=incremental"]


def environment(project: Path) -> dict:
    from pipeline.runner import job_environment

    return {**job_environment(), "PYTHONPATH": str(project)}  # the project's copy of the package


def shiftgrid(project: Path, *args: str) -> tuple[float, subprocess.CompletedProcess]:
    started = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "pipeline.cli", "--root", str(project), *args], cwd=project,
                          env=environment(project), capture_output=True, text=True, timeout=3600)
    seconds = time.perf_counter() - started
    if done.returncode != 0:
        raise SystemExit(f"`shiftgrid {' '.join(args)}` failed:\n{done.stderr[-3000:]}")
    return seconds, done


def involved_jobs(plan, city: str) -> tuple[dict[str, int], dict[str, int]]:
    """(every job of the full sweep, the jobs that truly involve `city`), counted per rule."""
    every, involved = {}, {}

    def count(rule: str, concerned: bool, n: int = 1) -> None:
        every[rule] = every.get(rule, 0) + n
        if concerned:
            involved[rule] = involved.get(rule, 0) + n

    for name in plan.cities:
        count("ingest_city", name == city)
    count("setup_tracking", False)
    for split_id in plan.splits:
        uses = city in plan.split_cities(split_id)
        count("build_split", uses)
        for job in plan.jobs.values():
            if job.split_id == split_id:
                count("fit_baselines" if job.model == "baselines" else "train_model", uses)
    for rule in AGGREGATION_RULES:
        count(rule, True)
    return every, involved


def deliver_new_rows(project: Path, raw_dir: str, city: str) -> Path:
    """The city's last day of rows again, one day later, appended to its dump (a new delivery)."""
    import pandas as pd

    dump = sorted((project / raw_dir / city).glob("*.csv"))[0]
    table = pd.read_csv(dump, dtype=str)
    times = pd.to_datetime(table["local_time"])
    last_day = table[times > times.max() - pd.Timedelta(days=1)].copy()
    last_day["local_time"] = (times[last_day.index] + pd.Timedelta(days=1)).dt.strftime("%Y-%m-%d %H:%M")
    with open(dump, "a") as handle:
        last_day.to_csv(handle, header=False, index=False)
    return dump


def scheduled_jobs(project: Path, overrides: list[str]) -> dict[str, int]:
    """Snakemake's dry run of the whole DAG: what a run would execute (a changed raw dump schedules its
    city's ingestion and everything downstream of its clean table)."""
    from pipeline.outdated import count_by_rule, parse_dry_run
    from pipeline.runner import dry_run

    os.environ["PYTHONPATH"] = str(project)  # dry_run starts Snakemake with this process's environment
    result = dry_run(overrides, root=project)
    return count_by_rule(parse_dry_run(result.stdout + "\n" + result.stderr))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, default=10, help="days of generated data per city (default 10)")
    parser.add_argument("--city", default="arlenvik", help="the city that gets new data")
    parser.add_argument("--keep", type=Path, help="build the project in this (new) folder and keep it")
    args = parser.parse_args()
    print(f"machine: {os.cpu_count()} cores, load {os.getloadavg()[0]:.1f}", flush=True)
    with tempfile.TemporaryDirectory() as scratch:
        from project_copy import make_project

        from pipeline.workflow import plan_workflow

        project = make_project(args.keep or Path(scratch) / "project", whole_package=True)
        overrides = write_study(project, args.days)
        shiftgrid(project, "demo", *overrides)
        plan = plan_workflow(overrides, project)
        every, involved = involved_jobs(plan, args.city)
        print(f"study: {len(plan.cities)} cities, {len(plan.splits)} splits, {sum(every.values())} jobs",
              flush=True)

        full, _ = shiftgrid(project, "run", *overrides)
        print(f"full sweep: {full:.1f} s", flush=True)
        deliver_new_rows(project, plan.cfg.data.raw_dir, args.city)
        _, status = shiftgrid(project, "status", *overrides)
        print("status after the delivery:\n  " + status.stdout.strip().replace("\n", "\n  "))
        scheduled = scheduled_jobs(project, overrides)
        rerun, _ = shiftgrid(project, "run", *overrides)
        after = scheduled_jobs(project, overrides)

    share = sum(involved.values()) / sum(every.values())
    print(f"re-run after new data for {args.city}: {rerun:.1f} s; afterwards "
          f"{'up to date' if not after else f'still scheduled: {after}'}")
    print("jobs per rule: full sweep / involve the city / scheduled for the re-run")
    for rule in every:
        print(f"  {rule:16s} {every[rule]:5d} {involved.get(rule, 0):5d} {scheduled.get(rule, 0):5d}")
    extra = {rule: n - involved.get(rule, 0) for rule, n in scheduled.items() if n != involved.get(rule, 0)}
    print(f"re-executed beyond the city's jobs: {extra or 'none'}")
    ratio = rerun / full
    print(f"share of jobs that involve {args.city}: {sum(involved.values())}/{sum(every.values())} = {share:.3f}")
    print(f"re-run wall / full-sweep wall: {ratio:.3f} = {ratio / share:.2f} x the share   "
          f"(goal: <= 1.2 x the share, i.e. <= {1.2 * share:.3f})")


if __name__ == "__main__":
    main()
