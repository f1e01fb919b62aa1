"""Faults during a real sweep, each resumed to a complete and consistent project (the real DAG; minutes).

One small project (2 invented cities, the linear model, one seed) lives through, in order:
1. a second `shiftgrid run` started while the first holds the project: refused in one line naming the lock;
2. a training job SIGKILLed mid-run: the sweep fails, its MLflow run is left RUNNING by its job and closed as
   KILLED by the next training job (pipeline.run_state); `shiftgrid run` again completes the sweep;
3. the whole workflow interrupted (SIGINT to `shiftgrid run`, as Ctrl-C): exit 130 with the resume command,
   the interrupted run marked KILLED by its own job, Snakemake's lock released; the resume completes.
After each resume: every planned cell has exactly one current finished run, the grid shows exactly those,
and no half-written Parquet, JSON, weights or report sits where a real one belongs.
Bounded: every subprocess and every wait has a timeout. Marked e2e (`make test-fast` skips it).
"""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from project_copy import make_project, shiftgrid

pytestmark = pytest.mark.e2e

# Long enough training (about 400 steps) that a job is reliably caught while its run is RUNNING.
EXPERIMENT = """# @package _global_
data:
  generator:
    days: 12
split:
  schemes: [loco]
  cities: [arlenvik, brumeholt]
forecast:
  lookback_hours: 24
  horizon_hours: 6
  stride_hours: 2
sweep:
  models: [linear]
  penalties: [erm]
  seeds: [0]
fit:
  max_steps: 400
  eval_every: 100
  batch_size: 64
penalty:
  warmup_steps: 10
report:
  bootstrap_samples: 50
tracking:
  experiment: shiftgrid-faults
"""
OVERRIDES = ["experiment=faults"]
SWEEP_TIMEOUT_S = 900


@pytest.fixture(scope="module")
def project(tmp_path_factory) -> Path:
    folder = make_project(tmp_path_factory.mktemp("faults"))
    (folder / "config" / "experiment" / "faults.yaml").write_text(EXPERIMENT)
    written = shiftgrid(folder, "demo", *OVERRIDES, timeout=600)
    assert written.returncode == 0, written.stderr[-2000:]
    return folder


def start_sweep(project: Path, *overrides: str, log: str) -> tuple[subprocess.Popen, Path]:
    """`shiftgrid run` in the background; output to a file (a pipe could fill up and stall it)."""
    out = project / f"{log}.out"
    handle = open(out, "w")
    process = subprocess.Popen([sys.executable, "-m", "pipeline.cli", "--root", str(project), "run", *overrides],
                               stdout=handle, stderr=subprocess.STDOUT, text=True)
    handle.close()
    return process, out


def running_training_run(project: Path, process: subprocess.Popen, seed: str) -> tuple[str, int]:
    """(run id, job pid) of the first MLflow run caught RUNNING for `seed`, read straight from SQLite."""
    database = project / "results" / "mlflow.db"
    query = ("SELECT r.run_uuid, p.value FROM runs r JOIN tags p ON p.run_uuid = r.run_uuid AND p.key = 'pid' "
             "JOIN tags s ON s.run_uuid = r.run_uuid AND s.key = 'seed' AND s.value = ? "
             "JOIN tags m ON m.run_uuid = r.run_uuid AND m.key = 'model' AND m.value = 'linear' "
             "WHERE r.status = 'RUNNING'")
    deadline = time.monotonic() + SWEEP_TIMEOUT_S
    while time.monotonic() < deadline:
        assert process.poll() is None, "the sweep ended before a training run was caught"
        if database.exists():
            try:
                with sqlite3.connect(f"file:{database}?mode=ro", uri=True, timeout=1) as connection:
                    found = connection.execute(query, (seed,)).fetchone()
            except sqlite3.Error:  # a writer holds the database for a moment
                found = None
            if found:
                return found[0], int(found[1])
        time.sleep(0.1)
    raise AssertionError("no training run was caught RUNNING")


def run_status(project: Path, run_id: str) -> tuple[str, dict]:
    from pipeline.tracking import client_for, resolve_tracking_uri

    run = client_for(resolve_tracking_uri(None, project / "results")).get_run(run_id)
    return run.info.status, run.data.tags


def assert_complete_and_consistent(project: Path, overrides: list[str]) -> None:
    """One current finished run per planned cell, the grid shows exactly those, nothing half-written."""
    from pipeline.tracking import SUPERSEDED_TAG
    from pipeline.verify import load_weights
    from pipeline.workflow import plan_workflow

    plan = plan_workflow(overrides, project)
    grid = pd.read_parquet(project / "results" / "grid.parquet")
    cells = grid.groupby(["split_id", "model", "penalty", "seed"]).size()
    assert (cells == 1).all() and len(cells) == len(plan.all_run_records()), cells
    for path in plan.all_run_records():
        record = json.loads((project / path).read_text())
        status, tags = run_status(project, record["run_id"])
        assert status == "FINISHED" and SUPERSEDED_TAG not in tags, (path, status)
        assert record["run_id"] in set(grid["run_id"])
        if record["penalty"] != "na":  # gradient-trained runs carry weights: whole, loadable, weights only
            weights = next((project / "results" / "mlartifacts").rglob(f"{record['run_id']}/artifacts/model/*.pt"))
            assert load_weights(weights)
    for folder in ("data", "results"):
        for path in (project / folder).rglob("*"):
            assert not path.name.endswith(".tmp"), f"temporary file left: {path}"
            if path.suffix == ".json" and "mlartifacts" not in path.parts:
                json.loads(path.read_text())
            elif path.suffix == ".parquet" and "mlartifacts" not in path.parts:
                pd.read_parquet(path)
    assert "</html>" in (project / "results" / "report.html").read_text()


def test_a_second_sweep_is_refused_and_a_killed_job_is_resumed(project):
    first, out = start_sweep(project, *OVERRIDES, log="first")
    try:
        lock = project / ".snakemake" / "shiftgrid.lock"
        deadline = time.monotonic() + 300
        while f"pid {first.pid}" not in (lock.read_text() if lock.exists() else ""):
            assert time.monotonic() < deadline and first.poll() is None, out.read_text()[-2000:]
            time.sleep(0.2)
        second = shiftgrid(project, "run", *OVERRIDES, timeout=300)
        assert second.returncode == 2
        assert second.stderr.count("\n") == 1 and ".snakemake/shiftgrid.lock" in second.stderr, second.stderr

        run_id, pid = running_training_run(project, first, seed="0")
        os.kill(pid, signal.SIGKILL)
        assert first.wait(timeout=SWEEP_TIMEOUT_S) != 0
    finally:
        first.kill()
        first.wait()
    # Its job could not close it; a later job of the sweep may already have (its pid is gone), or the resume will.
    assert run_status(project, run_id)[0] in ("RUNNING", "KILLED")

    resumed = shiftgrid(project, "run", *OVERRIDES, timeout=SWEEP_TIMEOUT_S)
    assert resumed.returncode == 0, (resumed.stdout[-2000:], resumed.stderr[-2000:])
    status, tags = run_status(project, run_id)
    assert status == "KILLED" and "closed_as_orphan_by" in tags
    assert_complete_and_consistent(project, OVERRIDES)


def test_ctrl_c_stops_the_sweep_cleanly_and_says_how_to_resume(project):
    overrides = [*OVERRIDES, "seed=1"]  # new training work: seed 1
    sweep, out = start_sweep(project, *overrides, log="interrupted")
    try:
        run_id, _ = running_training_run(project, sweep, seed="1")
        sweep.send_signal(signal.SIGINT)
        assert sweep.wait(timeout=300) == 130
    finally:
        sweep.kill()
        sweep.wait()
    output = out.read_text()
    assert f"resume with: shiftgrid --root {project} run experiment=faults seed=1" in output, output[-2000:]
    assert "Traceback" not in output, output[-3000:]
    status, tags = run_status(project, run_id)
    assert status == "KILLED" and "closed_as_orphan_by" not in tags  # closed by its own job
    assert not list((project / ".snakemake" / "locks").glob("*")), "Snakemake left its lock"

    resumed = shiftgrid(project, "run", *overrides, timeout=SWEEP_TIMEOUT_S)
    assert resumed.returncode == 0, (resumed.stdout[-2000:], resumed.stderr[-2000:])
    assert_complete_and_consistent(project, overrides)
