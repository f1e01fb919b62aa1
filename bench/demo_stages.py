"""Where a finished sweep's wall time went, stage by stage, and the share of (wall x cores) spent computing.

Run in the project folder after `make demo` (or any `shiftgrid demo --run` / `shiftgrid run`):
`python bench/demo_stages.py [results_dir] [--cores N]`. Reads the Snakemake logs of the last sweep
(.snakemake/log: the ingestion call and the DAG call that `shiftgrid demo --run` makes, each with its job
finish times), the benchmark files of the training and baseline jobs (wall seconds of each job process) and,
through bench/startup_overhead.py, each run's logged compute and preparation seconds. Prints:

- the wall time of each stage: ingestion, splits and tracking setup, training (from the end of the setup
  to the last training or baseline job), aggregation, report;
- job seconds per model family and of the longest per-split baselines job (issue goal: never the
  critical path);
- sweep efficiency: compute seconds over (DAG wall x cores). Goal >= 0.85. Never fails on timings.
"""

import argparse
import re
import sys
from datetime import datetime
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from startup_overhead import job_compute, job_walls  # noqa: E402  (a sibling script, not a package)

STAMP = re.compile(r"^\[(\w{3} \w{3} +\d+ \d\d:\d\d:\d\d \d{4})\]$")
FINISHED = re.compile(r"^Finished jobid: \d+ \(Rule: (\w+)\)")
SETUP_RULES = {"build_split", "setup_tracking", "diagnose_shift"}
TRAINING_RULES = {"train_model", "fit_baselines"}


def is_baselines(job: str) -> bool:
    """A split's baselines job (benchmarks/fit_baselines/<split>.tsv)."""
    return job.startswith("fit_baselines/")


def log_events(path: Path) -> tuple[datetime, list[tuple[datetime, str]]]:
    """The log's start (from its file name) and each (finish time, rule) in order."""
    start = datetime.strptime(path.name.split(".snakemake")[0], "%Y-%m-%dT%H%M%S.%f").replace(microsecond=0)
    events, stamp = [], None
    for line in path.read_text().splitlines():
        if match := STAMP.match(line.strip()):
            stamp = datetime.strptime(match.group(1), "%a %b %d %H:%M:%S %Y")
        elif (match := FINISHED.match(line.strip())) and stamp is not None:
            events.append((stamp, match.group(1)))
    return start, events


def last_sweep(log_dir: Path) -> tuple[Path | None, Path]:
    """The last log that trained (the DAG call) and the ingestion-only log just before it, if any."""
    logs = sorted(log_dir.glob("*.snakemake.log"))
    dag = next(p for p in reversed(logs) if "Rule: train_model" in p.read_text())
    before = logs[:logs.index(dag)]
    ingest = before[-1] if before and "Rule: ingest_city" in before[-1].read_text() else None
    return ingest, dag


def last_finish(events, rules, default):
    times = [t for t, rule in events if rule in rules]
    return max(times) if times else default


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("results", nargs="?", default="results")
    parser.add_argument("--cores", type=int, default=2, help="cores the sweep was given (default 2)")
    args = parser.parse_args()
    results = Path(args.results)
    ingest_log, dag_log = last_sweep(Path(".snakemake") / "log")
    start, events = log_events(dag_log)
    end = events[-1][0]
    setup_end = last_finish(events, SETUP_RULES, start)
    training_end = last_finish(events, TRAINING_RULES, setup_end)
    aggregate_end = last_finish(events, {"aggregate_grid"}, training_end)
    stages = {"splits, setup, shift": (setup_end - start).total_seconds(),
              "training (to the last training job)": (training_end - setup_end).total_seconds(),
              "aggregation": (aggregate_end - training_end).total_seconds(),
              "report": (end - aggregate_end).total_seconds()}
    if ingest_log is not None:
        ingest_start, ingest_events = log_events(ingest_log)
        stages = {"ingestion": (ingest_events[-1][0] - ingest_start).total_seconds(), **stages}
    print(f"stages of the last sweep ({dag_log.name}; finish times are to the second):")
    for stage, seconds in stages.items():
        print(f"  {stage:38s} {seconds:8.0f} s")
    print(f"  {'total':38s} {sum(stages.values()):8.0f} s")

    walls = job_walls(results)
    by_family: dict[str, list[float]] = {}
    for job, seconds in walls.items():  # train_model/<split>/<model> or fit_baselines/<split>
        family = "baselines" if is_baselines(job) else job.rsplit("/", 1)[-1]
        by_family.setdefault(family, []).append(seconds)
    print("job seconds (Snakemake benchmark files):")
    for family, seconds in sorted(by_family.items()):
        print(f"  {family:24s} {len(seconds):3d} jobs  {sum(seconds):8.0f} s  (longest {max(seconds):6.0f} s)")
    longest_training = max((s for job, s in walls.items() if job.startswith("train_model/")), default=0.0)
    baselines = max((s for job, s in walls.items() if is_baselines(job)), default=0.0)
    print(f"longest baselines job {baselines:.0f} s beside the longest training job {longest_training:.0f} s"
          f" ({'the longest job' if baselines > longest_training else 'not the longest job'})")

    dag_wall = (end - start).total_seconds()
    compute = sum(job_compute(results).values())
    print(f"sweep efficiency: compute {compute:.0f} s / (DAG wall {dag_wall:.0f} s x {args.cores} cores) = "
          f"{compute / (dag_wall * args.cores):.2f}   (goal: >= 0.85)")


if __name__ == "__main__":
    main()
