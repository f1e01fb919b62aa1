"""MLflow run states across faults: a run is RUNNING while it trains, FINISHED only when fully logged, and
KILLED or FAILED otherwise; a run left RUNNING by a job that died is closed by the next job.

Writes to the MLflow store of the training job (config `tracking.uri`, `tracking.experiment`); reads run
tags. Why a run is created before training starts: a job killed mid-training then leaves a visible run
(tags `host`, `pid`) that can be closed later, instead of silently leaving no trace.

Orphans: a RUNNING run is closed as KILLED (tag `closed_as_orphan_by`) by the next training job of the same
experiment when (a) it is the very unit that job is about to train (same `unit_digest`: Snakemake never runs
two jobs for the same output at once, and `shiftgrid run` holds a project lock), or (b) it was started on
this host by a process that no longer exists. A run of an older config on another host is not closed; it is
tagged superseded when its unit's new run finishes.
"""

from __future__ import annotations

import contextlib
import os
import socket

from pipeline import tracking

HOST_TAG, PID_TAG = "host", "pid"
UNIT_TAG = "unit_digest"  # set by pipeline.train_job: config slice, seed, code and split of one run
ORPHAN_TAG = "closed_as_orphan_by"


def start_run(client, experiment_id: str, run_name: str, tags: dict[str, str]) -> str:
    """Create the run (RUNNING) with its tags and the host and process that train it; return its id."""
    owner = {HOST_TAG: socket.gethostname(), PID_TAG: str(os.getpid())}
    run = client.create_run(experiment_id, run_name=run_name, tags={**{k: str(v) for k, v in tags.items()}, **owner})
    return run.info.run_id


@contextlib.contextmanager
def closed_on_failure(client, run_id: str):
    """Whatever stops the block marks the run: KILLED for an interrupt or termination, FAILED otherwise."""
    try:
        yield
    except BaseException as error:
        status = "KILLED" if isinstance(error, (KeyboardInterrupt, SystemExit)) else "FAILED"
        try:
            client.set_terminated(run_id, status)
        except Exception:  # the store itself may be what failed: the next job closes the run (close_orphans)
            pass
        raise


def _process_gone(pid_text: str | None) -> bool:
    try:
        os.kill(int(pid_text), 0)
    except (TypeError, ValueError):
        return False  # no pid recorded: only the identity rule applies
    except ProcessLookupError:
        return True
    except PermissionError:  # alive, another user's
        return False
    return False


def close_orphans(client, experiment_id: str, unit_digest: str) -> list[str]:
    """Close (KILLED) the RUNNING runs whose job is gone; return their ids. See the module docstring."""
    running = tracking.search_all_runs(client, [experiment_id], "attributes.status = 'RUNNING'")
    host = socket.gethostname()
    closed_by = f"{host}:{os.getpid()}"
    closed = []
    for run in running:
        tags = run.data.tags
        same_unit = tags.get(UNIT_TAG) == unit_digest
        dead_here = tags.get(HOST_TAG) == host and _process_gone(tags.get(PID_TAG))
        if same_unit or dead_here:
            client.set_tag(run.info.run_id, ORPHAN_TAG, closed_by)
            client.set_terminated(run.info.run_id, "KILLED")
            closed.append(run.info.run_id)
    return closed
