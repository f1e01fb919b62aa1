"""Faults around the tracking store and the project, without running the DAG (seconds each).

- a run left RUNNING by a dead job is closed as KILLED by the next job; an interrupted run is KILLED, a
  crashed one FAILED; a live job's run is left alone;
- a tracking server that is down, or a disk that refuses writes (a file-size limit stands in for a full disk
  or a quota), ends a training job in one line with no run record written: nothing marked done;
- `shiftgrid run` checks the store before any job (server down, unwritable path, database locked) and
  refuses in one line naming the lock while another sweep holds the project; the lock dies with its holder.
All traffic stays on 127.0.0.1; ports are taken from the kernel and closed again, so nothing answers there.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from synthetic_clean import clean_table, station_table

from pipeline import run_state
from pipeline.errors import InputError
from pipeline.splits import build_split, plan_splits, write_split
from pipeline.store_check import store_errors
from pipeline.sweep_guard import LOCK_NAME, project_lock
from pipeline.tracking import artifact_location, client_for, setup_store
from pipeline.train_job import run_train_job, unit_digest

REPO = Path(__file__).resolve().parents[1]
FIT = {"max_steps": 10, "batch_size": 16, "lr": 1e-3, "weight_decay": 0.0, "eval_every": 5, "patience": 8,
       "grad_clip": 1.0, "threads": 1}
FORECAST = {"target": "pm25", "lookback_hours": 24, "horizon_hours": 6, "stride_hours": 4, "fill_limit_hours": 3,
            "calendar": True, "exclude_features": []}
UNIT = {"job": {"model_name": "ridge", "model": {"family": "ridge", "alpha": 1.0}, "penalty_name": "na",
                "penalty": None, "fit": FIT, "selection": {"rule": "source-holdout", "also": ["target-peek"]},
                "forecast": FORECAST, "metrics": {"hourly_exceedance_threshold": 35.0}}, "seed": 0}


def closed_port() -> int:
    """A local port nothing listens on (the kernel's pick, closed again)."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def dead_pid() -> int:
    child = subprocess.Popen(["true"])
    child.wait()
    return child.pid


@pytest.fixture(scope="module")
def setting(tmp_path_factory):
    folder = tmp_path_factory.mktemp("store_faults")
    stations = station_table({"aa": [("aa_1", 48.0, 10.0)], "bb": [("bb_1", 48.5, 10.5)]})
    paths = {}
    for seed, city in enumerate(["aa", "bb"]):
        paths[city] = folder / f"{city}.parquet"
        clean_table([f"{city}_1"], 24 * 10, seed=seed).to_parquet(paths[city])
    plan = plan_splits({"schemes": ["loco"]}, stations, 24, 6)[0]
    write_split(build_split(plan, {c: str(p) for c, p in paths.items()}, 24, 6), folder / "split.json")
    uri = f"sqlite:///{folder}/mlflow.db"
    experiment_id = setup_store(uri, "faults", artifact_location(folder))
    return folder, uri, experiment_id, plan["split_id"]


def test_a_dead_jobs_run_is_closed_by_the_next_job_and_a_live_one_is_left_alone(setting):
    folder, uri, experiment_id, split_id = setting
    client = client_for(uri)
    identity = {"split_id": split_id, "model": "ridge", "penalty": "na", "seed": "0"}
    digest = unit_digest(UNIT["job"], 0, json.loads((folder / "split.json").read_text()))
    orphan = run_state.start_run(client, experiment_id, "orphan", {**identity, "unit_digest": "older config"})
    client.set_tag(orphan, run_state.PID_TAG, str(dead_pid()))  # its job was SIGKILLed on this host
    elsewhere = run_state.start_run(client, experiment_id, "elsewhere", {**identity, "unit_digest": digest})
    client.set_tag(elsewhere, run_state.HOST_TAG, "another-node")  # the same unit, killed on a cluster node
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        live = run_state.start_run(client, experiment_id, "live", {**identity, "unit_digest": "another unit"})
        client.set_tag(live, run_state.PID_TAG, str(sleeper.pid))  # a job still training on this host
        records = run_train_job(folder / "split.json", [UNIT], [folder / "r.json"], uri, "faults", "c1")
    finally:
        sleeper.kill()
        sleeper.wait()
    for run_id in (orphan, elsewhere):
        closed = client.get_run(run_id)
        assert closed.info.status == "KILLED" and run_state.ORPHAN_TAG in closed.data.tags
    assert client.get_run(live).info.status == "RUNNING"
    assert client.get_run(records[0]["run_id"]).info.status == "FINISHED"
    client.set_terminated(live, "KILLED")  # leave the store tidy for the other tests


def test_an_interrupted_run_is_killed_and_a_crashed_one_failed(setting):
    _, uri, experiment_id, _ = setting
    client = client_for(uri)
    for error, status in ((KeyboardInterrupt(), "KILLED"), (RuntimeError("boom"), "FAILED")):
        run_id = run_state.start_run(client, experiment_id, "x", {"split_id": "s", "model": "m", "penalty": "p",
                                                                  "seed": "9"})
        with pytest.raises(type(error)), run_state.closed_on_failure(client, run_id):
            raise error
        assert client.get_run(run_id).info.status == status


def test_a_tracking_server_down_ends_a_job_in_one_line_and_writes_no_record(setting, monkeypatch):
    folder, _, _, _ = setting
    monkeypatch.setenv("MLFLOW_HTTP_REQUEST_MAX_RETRIES", "0")  # bounded: MLflow would retry for minutes
    monkeypatch.setenv("MLFLOW_HTTP_REQUEST_TIMEOUT", "5")
    uri = f"http://127.0.0.1:{closed_port()}"
    with pytest.raises(InputError) as failed, store_errors(uri):
        run_train_job(folder / "split.json", [UNIT], [folder / "down.json"], uri, "faults", "c1")
    assert f"tracking store {uri}: tracking.uri: unavailable" in str(failed.value)
    assert "\n" not in str(failed.value) and not (folder / "down.json").exists()


def test_a_disk_that_refuses_writes_ends_a_job_in_one_line_with_nothing_marked_done(setting):
    """The job runs under a file-size limit below the database's size, as on a full disk or over a quota."""
    folder, uri, _, _ = setting
    record = folder / "full.json"
    program = (
        "import json, resource, signal, types, sys\n"
        "signal.signal(signal.SIGXFSZ, signal.SIG_IGN)\n"  # a refused write raises EFBIG instead of killing
        "from pipeline.scripts._step import run_step\n"
        "from pipeline.store_check import store_errors\n"
        "from pipeline.train_job import run_train_job\n"
        f"unit, folder, uri = json.loads({json.dumps(json.dumps(UNIT))}), {str(folder)!r}, {uri!r}\n"
        "resource.setrlimit(resource.RLIMIT_FSIZE, (64 * 1024, resource.RLIM_INFINITY))\n"
        "def work(_):\n"
        "    with store_errors(uri):\n"
        "        run_train_job(folder + '/split.json', [unit], [folder + '/full.json'], uri, 'faults', 'c2',\n"
        "                      reuse=False)\n"
        "run_step(types.SimpleNamespace(log=[folder + '/full.log'], rule='train_model'), work)\n")
    done = subprocess.run([sys.executable, "-c", program], capture_output=True, text=True, timeout=300, cwd=REPO)
    assert done.returncode == 2, done.stderr[-2000:]
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and "tracking.uri" in lines[0], done.stderr[-2000:]
    assert not record.exists()
    assert lines[0] in (folder / "full.log").read_text()  # the job's log keeps the details
    finished = client_for(uri).search_runs([setting[2]], "tags.code_digest = 'c2' and attributes.status = 'FINISHED'")
    assert finished == []


# ---- `shiftgrid run` before any job -----------------------------------------------------------------------

@pytest.fixture
def project(tmp_path):
    from project_copy import make_project

    return make_project(tmp_path / "project")


def refused(project: Path, *overrides: str) -> str:
    from project_copy import shiftgrid

    done = shiftgrid(project, "run", "experiment=tiny", "model=persistence", "penalty=erm", *overrides, timeout=300)
    assert done.returncode == 2, (done.stdout[-1000:], done.stderr[-2000:])
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), done.stderr[-2000:]
    assert not (project / "results").exists() and not (project / "data").exists(), "a job ran"
    return lines[0]


def test_run_refuses_when_the_tracking_server_is_down(project):
    port = closed_port()
    line = refused(project, f"tracking.uri=http://127.0.0.1:{port}")
    assert f"tracking store http://127.0.0.1:{port}" in line and "no tracking server answers" in line


def test_run_refuses_an_unwritable_store_path(project):
    (project / "not-a-folder").write_text("a file where the store's folder should be")
    line = refused(project, f"tracking.uri=sqlite:///{project}/not-a-folder/mlflow.db")
    assert "not-a-folder" in line and "cannot create the folder" in line


def test_run_refuses_a_locked_database(project, tmp_path):
    database = tmp_path / "store" / "mlflow.db"
    database.parent.mkdir()
    holder = sqlite3.connect(database, isolation_level=None)
    holder.execute("CREATE TABLE t (x)")
    holder.execute("BEGIN EXCLUSIVE")  # another writer, mid-transaction
    try:
        line = refused(project, f"tracking.uri=sqlite:///{database}")
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    assert "database is locked" in line and str(database) in line


def test_a_second_sweep_on_the_same_project_refuses_naming_the_lock(project):
    with project_lock(project, "shiftgrid run experiment=demo"):
        line = refused(project)
    assert LOCK_NAME in line and "busy" in line and "shiftgrid run experiment=demo" in line


def test_the_lock_dies_with_its_holder_even_on_sigkill(tmp_path):
    holder = subprocess.Popen([sys.executable, "-c", (
        "import sys, time\nfrom pipeline.sweep_guard import project_lock\n"
        f"with project_lock({str(tmp_path)!r}, 'holder'):\n    print('held', flush=True)\n    time.sleep(120)\n")],
        stdout=subprocess.PIPE, text=True, cwd=REPO)
    try:
        assert holder.stdout.readline().strip() == "held"
        with pytest.raises(InputError), project_lock(tmp_path, "second"):
            pass
        os.kill(holder.pid, signal.SIGKILL)
        holder.wait(timeout=30)
        deadline = time.monotonic() + 30
        while True:  # the kernel releases the lock as the process is reaped
            try:
                with project_lock(tmp_path, "third"):
                    break
            except InputError:
                assert time.monotonic() < deadline, "the lock outlived its holder"
                time.sleep(0.1)
    finally:
        holder.kill()
        holder.wait()
