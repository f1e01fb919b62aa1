"""Provenance as data: code digests from the import graph, file digests, git state, package versions.

Snakemake does not notice changes to modules a step imports, so each rule passes the digest
of the code its job runs as a param. That code is found, not listed: the transitive closure of the rule
script `pipeline/scripts/<rule>.py` inside the `pipeline` package (pipeline.import_graph, static, so no
torch is loaded to compute it). Training rules prune the model families they do not run, so changing the
LSTM's module re-runs the jobs of the families defined there only, while changing the training loop re-runs
every gradient-trained job. Reads source files, package metadata and `git`; writes nothing.
"""

from __future__ import annotations

import functools
import hashlib
import subprocess
import sys
from importlib import metadata
from pathlib import Path

from pipeline.errors import InputError
from pipeline.import_graph import ImportGraph, module_file

PACKAGE_DIR = Path(__file__).resolve().parent
TRAINING_ENTRY = "pipeline.train_job"  # what both training rules and `shiftgrid verify` run per unit

# Versions written into every run's tags (`version.*`), shown by `shiftgrid show`.
KEY_PACKAGES = ("shiftgrid", "torch", "numpy", "pandas", "pyarrow", "scikit-learn", "scipy", "mlflow",
                "snakemake", "hydra-core", "omegaconf")
# Libraries whose version can change a job's numbers: import name -> distributions. A rule depends on
# those its code imports; pyarrow comes with pandas because pandas reads and writes Parquet through it.
RESULT_LIBRARIES = {"torch": ("torch",), "numpy": ("numpy",), "pandas": ("pandas", "pyarrow"),
                    "sklearn": ("scikit-learn",), "scipy": ("scipy",),
                    "mlflow": ("mlflow",), "matplotlib": ("matplotlib",)}


def file_digest(path: Path | str, chunk: int = 1 << 20) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while block := handle.read(chunk):
            digest.update(block)
    return digest.hexdigest()


def _expand(relative: str, package_dir: Path) -> list[Path]:
    path = package_dir / relative
    if path.is_dir():
        return sorted(p for p in path.rglob("*.py") if "__pycache__" not in p.parts)
    return [path] if path.exists() else []


def _digest_files(paths, package_dir: Path) -> str:
    """sha256 over files, names (relative to the package) included, order fixed."""
    digest = hashlib.sha256()
    for path in sorted(set(paths)):
        digest.update(str(path.relative_to(package_dir)).encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()[:16]


def source_digest(relatives: tuple[str, ...] | list[str], package_dir: Path = PACKAGE_DIR) -> str:
    """Digest of named package files (folders: every .py inside); `["."]` is the whole package."""
    return _digest_files([p for rel in relatives for p in _expand(rel, package_dir)], package_dir)


@functools.lru_cache(maxsize=None)  # one graph per package folder and process; it re-parses edited files
def import_graph(package_dir: Path = PACKAGE_DIR) -> ImportGraph:
    return ImportGraph(package_dir)


def _families_pruned(graph: ImportGraph, families: list[str] | None) -> set[str]:
    """Modules of the model families a job does not run (nothing when it runs no family)."""
    if families is None:
        return set()
    defined = graph.family_modules()
    unknown = sorted(set(families) - set(defined))
    if unknown:
        raise InputError(f"no module under pipeline/models defines family {unknown[0]!r}", field="model.family")
    return set(defined.values()) - {defined[f] for f in families}


def closure(root: str, families: list[str] | None = None, package_dir: Path = PACKAGE_DIR) -> set[str]:
    """Package modules that `root` runs; with `families`, the other families' modules left out."""
    graph = import_graph(Path(package_dir))
    return graph.closure([root], prune=_families_pruned(graph, families))


def rule_entry(rule: str, package_dir: Path = PACKAGE_DIR) -> str:
    name = f"pipeline.scripts.{rule}"
    if module_file(Path(package_dir), name) is None:
        raise InputError(f"rule {rule!r} has no script pipeline/scripts/{rule}.py", field="rule")
    return name


def rule_scripts(package_dir: Path = PACKAGE_DIR) -> list[str]:
    """The rules that have a script `pipeline/scripts/<rule>.py` (helpers start with `_`)."""
    return sorted(p.stem for p in (Path(package_dir) / "scripts").glob("*.py") if not p.stem.startswith("_"))


def code_digest(rule: str, families: list[str] | None = None, package_dir: Path = PACKAGE_DIR) -> str:
    """Digest of every package file a rule's job runs: its script and the script's import closure."""
    package_dir = Path(package_dir)
    modules = closure(rule_entry(rule, package_dir), families, package_dir)
    return _digest_files(import_graph(package_dir).files(modules), package_dir)


def training_code_digest(families: list[str], package_dir: Path = PACKAGE_DIR) -> str:
    """Digest of the shared training path plus these families' modules (a run's `family_code_digest`)."""
    package_dir = Path(package_dir)
    return _digest_files(import_graph(package_dir).files(closure(TRAINING_ENTRY, families, package_dir)),
                         package_dir)


def family_module_file(family: str, package_dir: Path = PACKAGE_DIR) -> str:
    """The package-relative file that defines a model family (found statically)."""
    graph = import_graph(Path(package_dir))
    defined = graph.family_modules()
    if family not in defined:
        raise InputError(f"no module under pipeline/models defines family {family!r}", field="model.family")
    return str(module_file(graph.package_dir, defined[family]).relative_to(graph.package_dir))


def _version(distribution: str) -> str:
    try:
        return metadata.version(distribution)
    except metadata.PackageNotFoundError:
        return "not installed"


def rule_dependencies(rule: str, families: list[str] | None = None, package_dir: Path = PACKAGE_DIR
                      ) -> dict[str, str]:
    """Python and the versions of the result-relevant libraries a rule's code imports."""
    package_dir = Path(package_dir)
    imported = import_graph(package_dir).external(closure(rule_entry(rule, package_dir), families, package_dir))
    names = sorted({d for name in imported & set(RESULT_LIBRARIES) for d in RESULT_LIBRARIES[name]})
    return {"python": sys.version.split()[0], **{name: _version(name) for name in names}}


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
    return {"python": sys.version.split()[0], **{name: _version(name) for name in KEY_PACKAGES}}


def result_versions() -> dict[str, str]:
    """Python and every result-relevant library (RESULT_LIBRARIES): what a finished job records."""
    names = sorted({d for distributions in RESULT_LIBRARIES.values() for d in distributions})
    return {"python": sys.version.split()[0], **{name: _version(name) for name in names}}


def versions_file(log_path: Path | str) -> Path:
    """Where a job records the library versions it ran with: beside its log (`<log>.versions.json`)."""
    log_path = Path(log_path)
    return log_path.with_name(log_path.name + ".versions.json")
