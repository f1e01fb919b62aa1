"""Fixtures of the cluster test: the services tests/cluster/services.sh started, and the two tiny runs.

`tests/cluster/run_cluster_test.sh` installs and starts the services and exports what they are
(SHIFTGRID_TEST_*), or why a piece could not run here (SHIFTGRID_SLURM_MISSING, SHIFTGRID_SERVER_MISSING);
a test that needs a missing piece skips with exactly that reason. Under plain `make test` nothing is
started, and every test here skips saying so.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import pytest

from cluster_run import OVERRIDES, Bounded, clean_env, cli, missing, need, run_bounded, wait_all
from project_copy import make_project


@pytest.fixture(scope="session")
def password() -> str:
    need("SERVER")
    return os.environ["SHIFTGRID_TEST_PASSWORD"]


@pytest.fixture(scope="session")
def secret_uri(password) -> str:
    """The server's URI with credentials in it (the server itself does not check them): none may leak."""
    return os.environ["SHIFTGRID_TEST_SERVER"].replace("http://", f"http://shiftgrid:{password}@", 1)


@pytest.fixture(scope="session")
def database_uri() -> str:
    """The server's PostgreSQL database used directly as a store (no server in between; MLflow allows
    several clients on one database), password in the URI."""
    need("SERVER")
    return os.environ["SHIFTGRID_TEST_DATABASE"]


@dataclass
class TinyRuns:
    """The tiny experiment run twice from the same dumps: locally into SQLite, and through SLURM (or locally
    when SLURM is missing) into the MLflow server on PostgreSQL, credentials in the URI."""
    local: Path
    served: Path
    served_profile: str
    secret_uri: str
    outputs: list[str]  # every stdout/stderr the runs printed (searched for the password)
    served_output: str  # Snakemake's progress (it writes to stderr) and shiftgrid's lines
    seconds: dict[str, float]


@pytest.fixture(scope="session")
def tiny_runs(tmp_path_factory, secret_uri) -> TinyRuns:
    local = make_project(tmp_path_factory.mktemp("local"))
    served = make_project(tmp_path_factory.mktemp("served"))
    for project in (local, served):
        written = run_bounded(cli("--root", str(project), "demo", *OVERRIDES), clean_env(), 300)
        assert written.returncode == 0, written.stderr[-2000:]
    profile = "local" if missing("SLURM") else "slurm"
    # Both at once: the SLURM run spends much of its time waiting on the queue and on status checks.
    local_run = Bounded(cli("--root", str(local), "run", *OVERRIDES), clean_env()).start()
    served_run = Bounded(cli("--root", str(served), "run", *OVERRIDES, f"tracking.uri={secret_uri}",
                             "--profile", profile), clean_env()).start()
    results = dict(zip(("served", "local"), wait_all([served_run, local_run])))
    seconds = {"served": served_run.seconds, "local": local_run.seconds}
    print(f"\ntiny experiment: local+SQLite {seconds['local']:.0f} s, {profile}+server {seconds['served']:.0f} s "
          f"(run side by side)")
    for name, result in results.items():
        assert result.returncode == 0, (name, result.stdout[-4000:], result.stderr[-4000:])
    outputs = [text for result in results.values() for text in (result.stdout, result.stderr)]
    return TinyRuns(local, served, profile, secret_uri, outputs, results["served"].stdout + results["served"].stderr,
                    seconds)
