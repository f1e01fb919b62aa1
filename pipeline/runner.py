"""Run Snakemake as a subprocess (steadier than its Python API, which changed inside 9.x).

Reads nothing itself; builds the command lines for `shiftgrid run`, `demo --run` and `status`. Hydra
overrides travel as `--config overrides=[...]`, a JSON list that Snakemake reads back as a list (a shell-quoted
string loses its quotes there, so `split.cities=[a,b]` broke), and are re-composed by the Snakefile.
Ingestion runs as its own first phase: within one invocation Snakemake does not re-check downstream
jobs after an upstream job finishes, so a byte-identical re-ingested table would otherwise still
re-run everything after it.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

from pipeline.sweep_guard import call_interruptible
from pipeline.tracking import hide_credentials

PROFILES = {"local": "config/profiles/local", "slurm": "config/profiles/slurm"}


def snakemake_command(overrides: list[str], *, root: Path | str = ".", profile: str = "local",
                      targets: list[str] | None = None, extra: list[str] | None = None) -> list[str]:
    command = [sys.executable, "-m", "snakemake", "--snakefile", str(Path(root) / "Snakefile"),
               "--directory", str(root), "--profile", str(Path(root) / PROFILES.get(profile, profile))]
    if overrides:
        command += ["--config", f"overrides={json.dumps(list(overrides))}"]
    command += list(targets or [])
    command += list(extra or [])
    return command


def job_environment() -> dict[str, str]:
    env = dict(os.environ)
    # glibc malloc churn slows the LSTM ~x1.5 on CPU; these two settings remove it.
    env.setdefault("MALLOC_MMAP_MAX_", "0")
    env.setdefault("MALLOC_TRIM_THRESHOLD_", "68719476736")
    env.setdefault("OMP_NUM_THREADS", "1")
    return env


def run_pipeline(overrides: list[str], *, root: Path | str = ".", profile: str = "local",
                 extra: list[str] | None = None, quiet: bool = False) -> int:
    """Phase 1: ingestion only. Phase 2: everything else. Returns Snakemake's exit status."""
    flags = ["--quiet", "rules", "host", "reason"] if quiet else []  # keep the progress lines
    env = job_environment()
    overrides = hide_credentials(overrides, env)  # Snakemake logs its command line; jobs inherit env
    for phase in (["--until", "ingest_city"], []):
        command = snakemake_command(overrides, root=root, profile=profile, extra=[*phase, *flags, *(extra or [])])
        status = call_interruptible(command, env=env, cwd=root)  # Ctrl-C: Snakemake cleans up first
        if status != 0:
            return status
    return 0


def start_dry_run(overrides: list[str], *, root: Path | str = ".", extra: list[str] | None = None
                  ) -> subprocess.Popen:
    """`snakemake -n` started, not awaited (`shiftgrid status` explains while it runs); text pipes."""
    env = job_environment()
    command = snakemake_command(hide_credentials(overrides, env), root=root, extra=["-n", *(extra or [])])
    return subprocess.Popen(command, env=env, cwd=root, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)


def dry_run(overrides: list[str], *, root: Path | str = ".", extra: list[str] | None = None
            ) -> subprocess.CompletedProcess:
    process = start_dry_run(overrides, root=root, extra=extra)
    stdout, stderr = process.communicate()
    return subprocess.CompletedProcess(process.args, process.returncode, stdout, stderr)
