"""Shared shell of every rule script: send output to the job's log, turn bad input into one line.

A rule script runs with Snakemake's `snakemake` object; the work itself is a plain function of the
package, so each step also runs and is tested without Snakemake. After the work succeeds it writes the
library versions the job ran with beside the job's log (pipeline.provenance.versions_file), which
`shiftgrid status` compares with the installed ones (tracking.dependency_changes).
"""

import contextlib
import signal
import sys
import traceback
from pathlib import Path

from pipeline.atomic import write_json_atomic
from pipeline.errors import InputError
from pipeline.sweep_guard import raise_interrupt
from pipeline.tracking import redact
from pipeline.provenance import result_versions, versions_file


def run_step(snakemake, work) -> None:
    log_path = Path(snakemake.log[0]) if snakemake.log else None
    if log_path:
        log_path.parent.mkdir(parents=True, exist_ok=True)
    signal.signal(signal.SIGTERM, raise_interrupt)  # a scheduler's SIGTERM closes the MLflow run as for Ctrl-C
    with open(log_path, "w") if log_path else contextlib.nullcontext(sys.stderr) as log:
        with contextlib.redirect_stdout(log), contextlib.redirect_stderr(log):
            try:
                work(snakemake)
            except InputError as error:
                print(f"error: {redact(str(error))}", file=log)
                print(f"error: {redact(str(error))}", file=sys.__stderr__)
                sys.exit(2)
            except KeyboardInterrupt:
                print("error: interrupted", file=log)
                sys.exit(130)
            except Exception:
                # MLflow quotes the URL it failed on, credentials included.
                print(redact(traceback.format_exc()), file=log)
                print(f"error: step failed, see {log_path}", file=sys.__stderr__)
                sys.exit(1)
    if log_path:
        write_json_atomic({"rule": snakemake.rule, "versions": result_versions()}, versions_file(log_path))
