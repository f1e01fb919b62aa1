"""Helpers of the cluster test (not a test module): which services run, and commands with a hard limit."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass

import pytest

NOT_STARTED = ("cluster services not started: tests/cluster/run_cluster_test.sh installs SLURM, PostgreSQL and an "
               "MLflow server, starts them and runs these tests")
RUN_LIMIT_S = 900  # a hung cluster run fails the test instead of hanging CI
OVERRIDES = ["experiment=tiny"]


def missing(piece: str) -> str | None:
    """Why `piece` (SLURM, SERVER) is not running here, or None when it is."""
    if not os.environ.get("SHIFTGRID_SERVICES"):
        return NOT_STARTED
    return os.environ.get(f"SHIFTGRID_{piece}_MISSING")


def need(piece: str) -> None:
    """Skip with the exact reason the services script gave when `piece` (SLURM, SERVER) is not running."""
    reason = missing(piece)
    if reason:
        pytest.skip(reason)


def clean_env(**extra: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    env.update(extra)
    return env


def cli(*args: str) -> list[str]:
    """The command line of `shiftgrid ARGS...` run with this Python."""
    return [sys.executable, "-m", "pipeline.cli", *args]


@dataclass
class Bounded:
    """A command run in its own process group, killed with its whole group when it outlives its limit.
    Output goes to temporary files (no pipe to drain), so several can run side by side."""
    command: list[str]
    env: dict[str, str]
    limit_s: int = RUN_LIMIT_S
    cwd: str | None = None
    seconds: float | None = None  # wall time, once finished
    killed: bool = False

    def start(self) -> "Bounded":
        self._out, self._err = tempfile.TemporaryFile("w+"), tempfile.TemporaryFile("w+")
        self._started = time.perf_counter()
        self.process = subprocess.Popen(self.command, env=self.env, cwd=self.cwd, stdout=self._out,
                                        stderr=self._err, text=True, start_new_session=True)
        return self

    def done(self) -> bool:
        """Finished (or killed now, having outlived its limit)."""
        if self.seconds is None and self.process.poll() is None and \
                time.perf_counter() - self._started > self.limit_s:
            # The SLURM executor can ignore SIGTERM while it waits on a status command: kill the group, and
            # cancel what it left queued on the test cluster (every job there is this test's).
            os.killpg(self.process.pid, signal.SIGKILL)
            if shutil.which("scancel"):
                subprocess.run(["scancel", "--partition", "test"], check=False)
            self.process.wait()
            self.killed = True
        if self.seconds is None and self.process.poll() is not None:
            self.seconds = time.perf_counter() - self._started
        return self.seconds is not None

    def wait(self) -> subprocess.CompletedProcess:
        while not self.done():
            time.sleep(0.2)
        note = f"\nKILLED after {self.limit_s} s" if self.killed else ""
        texts = []
        for stream in (self._out, self._err):
            stream.seek(0)
            texts.append(stream.read())
            stream.close()
        return subprocess.CompletedProcess(self.command, self.process.returncode, texts[0], texts[1] + note)


def wait_all(commands: list[Bounded]) -> list[subprocess.CompletedProcess]:
    """Wait for commands started side by side; each one's `seconds` is its own wall time."""
    while not all([command.done() for command in commands]):  # a list: every limit is checked
        time.sleep(0.2)
    return [command.wait() for command in commands]


def run_bounded(command: list[str], env: dict[str, str], limit_s: int = RUN_LIMIT_S) -> subprocess.CompletedProcess:
    return Bounded(command, env, limit_s).start().wait()
