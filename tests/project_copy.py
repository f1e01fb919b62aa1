"""Temporary project folders for tests that run the real Snakemake DAG (not a test module).

A project folder holds config/, the Snakefile and the rule files; the package itself is imported from the
installed checkout unless `whole_package` copies it too (tests that edit package code in the copy).
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def make_project(folder: Path, whole_package: bool = False) -> Path:
    shutil.copytree(REPO / "config", folder / "config")
    shutil.copy(REPO / "Snakefile", folder / "Snakefile")
    if whole_package:
        shutil.copytree(REPO / "pipeline", folder / "pipeline", ignore=shutil.ignore_patterns("__pycache__"))
    else:
        shutil.copytree(REPO / "pipeline" / "rules", folder / "pipeline" / "rules")
        shutil.copytree(REPO / "pipeline" / "scripts", folder / "pipeline" / "scripts")
    return folder


def shiftgrid(project: Path, *args: str, timeout: int = 900, **options) -> subprocess.CompletedProcess:
    """`shiftgrid --root PROJECT ARGS...` in a subprocess; options go to subprocess.run (cwd, env)."""
    return subprocess.run([sys.executable, "-m", "pipeline.cli", "--root", str(project), *args],
                          capture_output=True, text=True, timeout=timeout, **options)
