"""One writer per project, a checked store before any job, and Ctrl-C that leaves a resumable project.

Used by `shiftgrid run` and `shiftgrid demo` (pipeline/commands/), by pipeline.runner (the Snakemake
subprocess) and by the rule scripts (pipeline/scripts/_step.py). Reads and writes the lock file
`<root>/.snakemake/shiftgrid.lock` (an advisory lock; the file names its holder); obeys `tracking.uri`
through the caller (pipeline.store_check).

- Lock: a second `shiftgrid run` on the same project refuses in one line naming the lock. The kernel drops
  the lock when its holder dies, even by SIGKILL, so a stale lock cannot block a resume. Snakemake inherits
  the lock's descriptor: while it still runs, the project stays locked.
- Interrupt: Snakemake runs in its own process group, so a terminal's Ctrl-C reaches `shiftgrid` only. It
  hands Snakemake the interrupt and its jobs a SIGTERM (see `_stop`), and waits while Snakemake stops them,
  removes their incomplete outputs and unlocks its folder; only then does it exit (status 130) with the
  resume command.
- Jobs: SIGTERM (what a batch scheduler sends before SIGKILL) is turned into the same interrupt, so a job's
  MLflow run is closed as KILLED (pipeline.run_state).
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import shlex
import signal
import subprocess
import sys
from pathlib import Path

from pipeline.errors import InputError

LOCK_NAME = ".snakemake/shiftgrid.lock"
INTERRUPT_GRACE_S = 120  # Snakemake waits for its jobs to stop; after this a second signal is sent
_HELD: list[int] = []  # descriptors of the locks this process holds (handed to Snakemake)


@contextlib.contextmanager
def project_lock(root, command: str):
    """Hold the project's lock for the block; InputError (one line naming the lock) if another holds it."""
    if _HELD:  # already held by this process (`demo --run` locks once for writing dumps and running)
        yield
        return
    path = Path(root) / LOCK_NAME
    path.parent.mkdir(parents=True, exist_ok=True)
    descriptor = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        holder = os.pread(descriptor, 400, 0).decode("utf-8", "replace").strip() or "another process"
        os.close(descriptor)
        raise InputError(f"the project is busy: {holder}; wait for it to finish (only one sweep writes a "
                         f"project at a time)", file=str(path), field="lock") from None
    os.ftruncate(descriptor, 0)
    os.pwrite(descriptor, f"`{command}` (pid {os.getpid()})\n".encode(), 0)
    _HELD.append(descriptor)
    try:
        yield
    finally:  # the file stays: removing it would let a waiting process lock a file nobody else sees
        _HELD.remove(descriptor)
        os.close(descriptor)


def call_interruptible(command: list[str], **options) -> int:
    """subprocess.call in its own process group; on KeyboardInterrupt stop it cleanly, then re-raise."""
    process = subprocess.Popen(command, start_new_session=True, pass_fds=tuple(_HELD), **options)
    try:
        return process.wait()
    except KeyboardInterrupt:
        _stop(process)
        raise


def _group_members(group: int) -> list[int]:
    """Processes of a process group (Linux /proc; elsewhere none are found and the group gets SIGINT)."""
    members = []
    for entry in os.scandir("/proc") if os.path.isdir("/proc") else ():
        if entry.name.isdigit():
            try:
                stat = Path(entry.path, "stat").read_text()
            except OSError:  # ended meanwhile
                continue
            if int(stat[stat.rindex(")") + 2:].split()[2]) == group:  # fields after the name: state ppid pgrp
                members.append(int(entry.name))
    return members


# A batch scheduler's client commands in Snakemake's group are not jobs: the SLURM executor runs them to
# submit, watch and, on this very interrupt, cancel its jobs (a SIGTERM to scancel left them queued).
SCHEDULER_CLIENTS = {"sbatch", "squeue", "scancel", "sacct"}


def _command_name(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/comm").read_text().strip()
    except OSError:  # ended meanwhile
        return ""


def _stop(process: subprocess.Popen) -> None:
    """Snakemake gets SIGINT (it then cancels, removes incomplete outputs and unlocks); its jobs get SIGTERM,
    which a job still importing obeys silently and a working job turns into its own clean stop (a SIGINT
    there would print a traceback mid-import). Jobs spawned meanwhile get it too. A second Ctrl-C, or no end
    within INTERRUPT_GRACE_S, stops the whole group: SIGTERM, then SIGKILL."""
    group = process.pid  # start_new_session: Snakemake leads its own group
    if not _group_members(group):
        with contextlib.suppress(ProcessLookupError):
            os.killpg(group, signal.SIGINT)
    with contextlib.suppress(ProcessLookupError):
        process.send_signal(signal.SIGINT)
    told: set[int] = {group}
    try:
        for _ in range(INTERRUPT_GRACE_S):
            for pid in set(_group_members(group)) - told:
                if _command_name(pid) not in SCHEDULER_CLIENTS:
                    with contextlib.suppress(ProcessLookupError):
                        os.kill(pid, signal.SIGTERM)
                told.add(pid)
            try:
                process.wait(timeout=1)
                return
            except subprocess.TimeoutExpired:
                continue
    except KeyboardInterrupt:
        pass
    for signum in (signal.SIGTERM, signal.SIGKILL):
        with contextlib.suppress(ProcessLookupError):
            os.killpg(group, signum)
        try:
            process.wait(timeout=10)
            return
        except (subprocess.TimeoutExpired, KeyboardInterrupt):
            continue


def resume_hint(root, overrides: list[str]) -> str:
    from pipeline.tracking import redact

    words = ["shiftgrid", "--root", str(root), "run", *overrides]
    return (f"interrupted: finished jobs are kept and unfinished ones were removed; resume with: "
            f"{redact(shlex.join(words))}")


def raise_interrupt(signum, frame):
    """Signal handler for jobs: SIGTERM becomes KeyboardInterrupt, so cleanup code runs as for Ctrl-C."""
    raise KeyboardInterrupt(f"signal {signum}")


def run_guarded(overrides: list[str], root, tracking_uri: str, command: str = "run", **pipeline_options) -> int:
    """`run_pipeline` under the project lock, after checking the store; prints how to resume on Ctrl-C."""
    from pipeline.runner import run_pipeline
    from pipeline.store_check import check_store

    with project_lock(root, f"shiftgrid {command}"):
        check_store(tracking_uri)
        try:
            return run_pipeline(overrides, root=root, **pipeline_options)
        except KeyboardInterrupt:
            print(resume_hint(root, overrides), file=sys.stderr)
            raise
