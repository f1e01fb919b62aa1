"""Wall time of every `shiftgrid` command on a finished project, each next to its goal (never pass/fail).

    .venv/bin/python bench/command_latency.py [PROJECT] [--overrides experiment=tiny] [--rounds 5]

PROJECT is a finished project folder (config/, Snakefile, results/ with a grid and an MLflow store); without
one, a tiny project (experiment=tiny) holding a copy of the package is made and run in a temporary folder
first (minutes); the commands then run that copy, so edits to the checkout during the rounds change nothing. Every command
runs as a fresh process, as a user types it; the figure is the median of --rounds rounds after one warm-up
round (which also fills the plan cache of pipeline.plan_cache, as any earlier Snakemake call would have).
A round runs every command once, in turn, so figures compared side by side saw the same machine load.

Side by side, in the same loop: `snakemake -n` with the arguments `shiftgrid status` uses, and the bare
store reads the audit commands cannot avoid (pandas reading grid.parquet; MLflow opening the SQLite
store and listing / fetching runs), so the figures say what each command adds. Reads the project; writes
only Snakemake's dry-run bookkeeping and the plan cache in it. CI does not run this script.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from pipeline.runner import job_environment, snakemake_command  # noqa: E402
from pipeline.tracking import resolve_tracking_uri  # noqa: E402

SHIFTGRID = [sys.executable, "-m", "pipeline.cli"]


def timed(commands: dict[str, list[str]], cwd: Path, repeat: int) -> dict[str, float]:
    """Median wall time in seconds of each command over `repeat` rounds (one unmeasured warm-up round)."""
    times: dict[str, list[float]] = {name: [] for name in commands}
    for round_ in range(repeat + 1):
        for name, command in commands.items():
            started = time.perf_counter()
            done = subprocess.run(command, cwd=cwd, env=job_environment(), capture_output=True, text=True)
            elapsed = time.perf_counter() - started
            if done.returncode != 0:
                raise SystemExit(f"failed: {' '.join(command)}\n{done.stderr[-2000:]}")
            if round_:
                times[name].append(elapsed)
    return {name: statistics.median(values) for name, values in times.items()}


def tiny_project(folder: Path, overrides: list[str]) -> Path:
    sys.path.insert(0, str(REPO / "tests"))
    from project_copy import make_project, shiftgrid

    # Its own copy of the package: the plan cache is keyed by the package's source, so edits to the checkout
    # while the rounds run (other work on this machine) would make one command re-plan and spare the next.
    project = make_project(folder / "project", whole_package=True)
    for args in (["demo", *overrides], ["run", *overrides]):
        done = shiftgrid(project, *args, cwd=project)
        if done.returncode != 0:
            raise SystemExit(f"could not make the tiny project: {done.stderr[-2000:]}")
    return project


def some_run_id(project: Path, results_dir: str) -> str:
    record = next((project / results_dir / "runs").rglob("*.json"))
    return json.loads(record.read_text())["run_id"]


def measure(project: Path, overrides: list[str], repeat: int) -> list[tuple[str, float, str]]:
    from pipeline.workflow import plan_config

    cfg = plan_config(overrides, project)
    uri = resolve_tracking_uri(cfg.tracking.uri, project / cfg.results_dir)
    grid = project / cfg.results_dir / "grid.parquet"
    run_id = some_run_id(project, cfg.results_dir)
    root = ["--root", str(project)]
    figures = timed({
        "--help": [*SHIFTGRID, "--help"],
        "grid": [*SHIFTGRID, *root, "grid", *overrides],
        "read grid.parquet (pandas)": [sys.executable, "-c", f"import pandas; pandas.read_parquet({str(grid)!r})"],
        "runs": [*SHIFTGRID, *root, "runs", *overrides],
        "list runs (MLflow client)": [sys.executable, "-c", "from mlflow.tracking import MlflowClient\n"
                                      f"c = MlflowClient({uri!r})\n"
                                      "c.search_runs([e.experiment_id for e in c.search_experiments()])"],
        "show": [*SHIFTGRID, *root, "show", run_id[:12], *overrides],
        "fetch one run (MLflow client)": [sys.executable, "-c", "from mlflow.tracking import MlflowClient\n"
                                          f"c = MlflowClient({uri!r})\nc.get_run({run_id!r})\n"
                                          f"c.list_artifacts({run_id!r})"],
        "status": [*SHIFTGRID, *root, "status", *overrides],
        "snakemake -n": snakemake_command(overrides, root=project, extra=["-n"]),
    }, project, repeat)
    f = figures
    return [
        ("shiftgrid --help", f["--help"], "well under 1 s"),
        ("shiftgrid grid", f["grid"], f"dominated by reading the grid: pandas alone {f['read grid.parquet (pandas)']:.2f} s "
                                      f"({f['read grid.parquet (pandas)'] / f['grid']:.0%} of it)"),
        ("shiftgrid runs", f["runs"], f"dominated by the store: MLflow listing alone {f['list runs (MLflow client)']:.2f} s "
                                      f"({f['list runs (MLflow client)'] / f['runs']:.0%} of it)"),
        ("shiftgrid show", f["show"], f"dominated by the store: MLflow fetch alone {f['fetch one run (MLflow client)']:.2f} s "
                                      f"({f['fetch one run (MLflow client)'] / f['show']:.0%} of it)"),
        ("shiftgrid status", f["status"], f"within 1.2 x snakemake -n ({f['snakemake -n']:.2f} s): "
                                          f"{f['status'] / f['snakemake -n']:.2f} x"),
    ]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("project", nargs="?", help="finished project folder (default: make a tiny one)")
    parser.add_argument("--overrides", nargs="*", default=["experiment=tiny"])
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        project = Path(args.project).resolve() if args.project else tiny_project(Path(folder), args.overrides)
        load_before = os.getloadavg()[0]  # the machine's state while measuring: other work shifts every figure
        rows = measure(project, args.overrides, args.rounds)
    print(f"cores: {os.cpu_count()}, 1-minute load average {load_before:.1f} before the rounds, "
          f"{os.getloadavg()[0]:.1f} after; median of {args.rounds} rounds, overrides: {' '.join(args.overrides)}")
    print(f"{'command':<18} {'seconds':>8}  goal")
    for name, seconds, goal in rows:
        print(f"{name:<18} {seconds:>8.2f}  {goal}")


if __name__ == "__main__":
    main()
