"""Provenance as data: digests of code and files, git state, package versions.

Snakemake does not notice changes to modules a step imports, so each rule passes the
digest of exactly the source files its step runs as a param: changing the LSTM file re-runs LSTM jobs
only, changing the training loop re-runs every training job. Reads source files and `git`; writes nothing.
"""

from __future__ import annotations

import functools
import hashlib
import importlib
import subprocess
import sys
from importlib import metadata
from pathlib import Path

PACKAGE_DIR = Path(__file__).resolve().parent

# Modules every training job runs, whatever the model family (relative to the package directory).
TRAINING_CORE = ("train.py", "train_job.py", "train_loop.py", "penalties.py", "windows.py", "metrics.py", "selection.py",
                 "tracking.py", "models/__init__.py", "models/base.py")
INGEST_CORE = ("ingest", "units.py", "stations.py", "variables.py")
SPLIT_CORE = ("splits.py", "geo.py")
AGGREGATE_CORE = ("aggregate.py", "grid_stats.py", "stats.py", "metrics.py", "shift.py", "report")
STAGE_CODE = {"ingest": INGEST_CORE, "splits": SPLIT_CORE, "aggregate": AGGREGATE_CORE}

KEY_PACKAGES = ("shiftgrid", "torch", "numpy", "pandas", "pyarrow", "scikit-learn", "scipy", "statsmodels",
                "mlflow", "snakemake", "hydra-core", "omegaconf")


def file_digest(path: Path | str, chunk: int = 1 << 20) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while block := handle.read(chunk):
            digest.update(block)
    return digest.hexdigest()


def _expand(relative: str) -> list[Path]:
    path = PACKAGE_DIR / relative
    if path.is_dir():
        return sorted(p for p in path.rglob("*.py") if "__pycache__" not in p.parts)
    return [path] if path.exists() else []


def source_digest(relatives: tuple[str, ...] | list[str]) -> str:
    """sha256 over the named package files (folders: every .py inside), names included, order fixed."""
    digest = hashlib.sha256()
    for path in sorted({p for rel in relatives for p in _expand(rel)}):
        digest.update(str(path.relative_to(PACKAGE_DIR)).encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()[:16]


def family_module_file(family: str) -> str:
    """The package-relative file that defines a model family (so its edits re-run only its jobs)."""
    from pipeline.models import MODEL_FAMILIES

    module = importlib.import_module(MODEL_FAMILIES[family].__module__)
    return str(Path(module.__file__).resolve().relative_to(PACKAGE_DIR))


def training_code_digest(families: list[str]) -> str:
    """Digest of the shared training code plus the files defining these families."""
    return source_digest([*TRAINING_CORE, *(family_module_file(f) for f in families)])


@functools.lru_cache(maxsize=None)  # one job logs several runs: ask git once
def git_state(root: Path | str = PACKAGE_DIR.parent) -> dict:
    """Commit and dirty flag of the checkout holding the package code; "unknown" outside git."""
    def run(*args: str) -> str:
        return subprocess.run(["git", *args], cwd=root, capture_output=True, text=True, timeout=10,
                              check=True).stdout.strip()
    try:
        commit = run("rev-parse", "HEAD")
        dirty = bool(run("status", "--porcelain", "--untracked-files=no"))
    except (OSError, subprocess.SubprocessError):
        return {"commit": "unknown", "dirty": "unknown"}
    return {"commit": commit, "dirty": str(dirty).lower()}


@functools.lru_cache(maxsize=None)
def package_versions() -> dict[str, str]:
    versions = {"python": sys.version.split()[0]}
    for name in KEY_PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions
