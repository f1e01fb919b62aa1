"""A cache of the DAG plan: Snakemake invocations and `shiftgrid status` skip Hydra when nothing changed.

Composing the plan costs two Hydra compositions (pipeline.config_variants.VariantComposer), the splits
and every job's params at every Snakemake invocation: seconds for experiment=full. The plan is a function
of the overrides, the config tree, the files the plan reads (the station table), the package's code and
the library versions (code digests and, with tracking.dependency_changes=rerun, versions are part of it);
not of where the project folder sits, so a moved project keeps its entries. The key covers the
overrides, the config tree and the code; the entry lists the files the plan read with their sha256, and,
for a plan that holds versions, the versions, both checked on every load (so a station table outside
config/ is covered too).

Reads and writes `<project>/.snakemake/shiftgrid-plans/<key>.json` (the newest few entries are kept).
Obeys no config key itself. Imports neither Hydra nor pandas, so a hit is cheap.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

from pipeline import provenance

CACHE_DIR = Path(".snakemake") / "shiftgrid-plans"
KEEP = 8  # entries kept per project: a few override sets used side by side


def plan_key(overrides: list[str], root: Path) -> str:
    digest = hashlib.sha256()
    digest.update(json.dumps({"overrides": list(overrides), "code": provenance.source_digest(["."])},
                             sort_keys=True).encode())
    config = root / "config"
    for path in sorted(p for p in config.rglob("*") if p.is_file()) if config.is_dir() else []:
        digest.update(str(path.relative_to(config)).encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()[:24]


def _entry(root: Path, key: str) -> Path:
    return root / CACHE_DIR / f"{key}.json"


def load(root: Path, key: str) -> dict | None:
    """The cached plan data, or None when absent, unreadable or one of the files it read changed."""
    try:
        entry = json.loads(_entry(root, key).read_text(encoding="utf-8"))
        for name, digest in entry["inputs"].items():
            if provenance.file_digest(root / name) != digest:
                return None
        if entry["versions"] is not None and entry["versions"] != provenance.result_versions():
            return None
        return entry["plan"]
    except (OSError, ValueError, KeyError, TypeError):
        return None  # a missing or damaged entry is recomputed, never trusted


def store(root: Path, key: str, plan: dict, inputs: list[str], holds_versions: bool) -> None:
    """Write the entry (`inputs`: files the plan read, relative to the project; `holds_versions`: the plan
    has library versions in its params) and drop the oldest entries."""
    from pipeline.atomic import write_text_atomic

    entry = {"inputs": {name: provenance.file_digest(root / name) for name in inputs}, "plan": plan,
             "versions": provenance.result_versions() if holds_versions else None}
    try:
        write_text_atomic(json.dumps(entry, sort_keys=True), _entry(root, key))
        entries = sorted((root / CACHE_DIR).glob("*.json"), key=lambda p: p.stat().st_mtime_ns, reverse=True)
        for old in entries[KEEP:]:
            old.unlink(missing_ok=True)
    except OSError:
        pass  # a read-only project folder plans without a cache
