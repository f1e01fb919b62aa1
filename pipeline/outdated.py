"""What is out of date and why: Snakemake's dry-run job list turned into plain reasons.

Reads the text of `snakemake -n` (one block per job: rule, output, reason, wildcards), Snakemake's stored
job metadata (.snakemake/metadata/<base64 of the output path>: the params of the last execution and the
sha256 of each input) and the raw dumps. Writes nothing. `--list-changes params` lists every output in
Snakemake 9.27, so it is not used. Ingestion runs as a first phase: a raw dump that was only
touched or rewritten identically re-ingests to a byte-identical table and nothing after it re-runs, so
such a dump is reported apart from real new data.
"""

from __future__ import annotations

import ast
import base64
import json
import re
from collections import Counter, defaultdict
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.provenance import file_digest
from pipeline.workflow import ALL_SPLITS, BASELINES

TRAINING_RULES = ("train_model", "fit_baselines")
AGGREGATION_RULES = ("aggregate_grid", "diagnose_shift", "render_report")
_HEADER = re.compile(r"^(?:local)?rule (\w+):\s*$")
_FIELD = re.compile(r"^\s+(\w+): (.*)$")


@dataclass
class PlannedJob:
    rule: str
    output: list[str] = field(default_factory=list)
    input: list[str] = field(default_factory=list)
    reason: str = ""
    wildcards: dict[str, str] = field(default_factory=dict)


def parse_dry_run(text: str) -> list[PlannedJob]:
    """Job blocks of `snakemake -n` output (the target rule `all` excluded)."""
    jobs, current = [], None
    for line in text.splitlines():
        header = _HEADER.match(line)
        if header:
            current = PlannedJob(header.group(1))
            if current.rule != "all":
                jobs.append(current)
            continue
        found = _FIELD.match(line) if current is not None else None
        if not found:
            if line and not line.startswith(" "):
                current = None
            continue
        key, value = found.groups()
        if key in ("output", "input"):
            setattr(current, key, [v.strip() for v in value.split(",") if v.strip()])
        elif key == "reason":
            current.reason = value.strip()
        elif key == "wildcards":
            current.wildcards = dict(item.strip().split("=", 1) for item in value.split(",") if "=" in item)
    return jobs


def count_by_rule(jobs: list[PlannedJob]) -> dict[str, int]:
    return dict(Counter(job.rule for job in jobs))


def stored_metadata(root: Path | str, output: str) -> dict | None:
    name = base64.urlsafe_b64encode(output.encode()).decode()
    path = Path(root) / ".snakemake" / "metadata" / name
    try:
        return json.loads(path.read_text())
    except (OSError, json.JSONDecodeError):
        return None


def stored_params(meta: dict | None) -> list:
    """The params Snakemake stored for the last execution (each stored as its repr)."""
    values = []
    for text in (meta or {}).get("params") or []:
        try:
            values.append(ast.literal_eval(text))
        except (ValueError, SyntaxError):
            values.append(text)
    return values


def raw_content_changed(meta: dict | None, root: Path | str) -> list[str]:
    """Raw inputs whose sha256 differs from the one stored at the last ingestion (new files included)."""
    stored = (meta or {}).get("input_checksums") or {}
    if isinstance(stored, str):
        stored = ast.literal_eval(stored)
    changed = []
    for path, checksum in stored.items():
        file = Path(root) / path
        now = "sha256:" + file_digest(file) if file.exists() else None
        if now != checksum:
            changed.append(path)
    return changed


def _unit_key(unit: dict) -> tuple:
    return unit["job"]["model_name"], unit["job"]["penalty_name"], unit["seed"]


def unit_changes(old: list, new_json: str) -> list[tuple[str, str, str]]:
    """(model, penalty, section) for every unit whose config slice section differs from the last run."""
    new = {_unit_key(u): u["job"] for u in json.loads(new_json)}
    before = None
    for value in old:
        if isinstance(value, str) and value.startswith("[") and '"model_name"' in value:
            before = {_unit_key(u): u["job"] for u in json.loads(value)}
    if before is None:
        return [("?", "?", "job settings")]
    changes = set()
    for key, job in new.items():
        previous = before.get(key)
        sections = ["new run"] if previous is None else [k for k in set(job) | set(previous)
                                                        if job.get(k) != previous.get(k)]
        changes.update((key[0], key[1], section) for section in sections)
    return sorted(changes)


def _clean_city(path: str) -> str | None:
    found = re.search(r"([a-z][a-z0-9]*)\.parquet$", path)
    return found.group(1) if found and "clean" in path else None


def explain(jobs: list[PlannedJob], plan, root: Path | str) -> list[str]:
    """Plain reasons, one line each, with how many jobs each one brings."""
    reasons: dict[str, set] = defaultdict(set)
    touched_only, new_data, new_splits = set(), set(), set()
    for job in jobs:
        if job.rule == "ingest_city":
            city = job.wildcards.get("city", "?")
            meta = stored_metadata(root, job.output[0]) if job.output else None
            if "Missing output" in job.reason:
                reasons[f"city {city} not ingested yet"].add(city)
            elif "Params have changed" in job.reason or "Code has changed" in job.reason:
                reasons[f"ingestion settings or code of city {city} changed"].add(city)
                new_data.add(city)
            elif raw_content_changed(meta, root):
                new_data.add(city)
            else:
                touched_only.add(city)
    for job in jobs:
        if job.rule == "build_split" and "Missing output" in job.reason:
            new_splits.add(job.wildcards.get("split_id"))
    for job in jobs:
        key = tuple(job.output)
        if job.rule in TRAINING_RULES:
            split_id = job.wildcards.get("split_id", ALL_SPLITS)
            model = job.wildcards.get("model", BASELINES)
            planned = plan.jobs.get((split_id, model))
            families = sorted({u["job"]["model"]["family"] for u in planned.units}) if planned else ["?"]
            # the baselines job covers every split: it is concerned by every city
            cities = plan.split_cities(split_id) if split_id in plan.splits else list(plan.cities)
            if split_id in new_splits or (split_id == ALL_SPLITS and new_splits and "Missing output" in job.reason):
                reasons["new splits"].add(key)
                continue
            if "Missing output" in job.reason:
                reasons[f"never trained: model {model}"].add(key)
                continue
            if "Params have changed" in job.reason and planned is not None:
                old = stored_params(stored_metadata(root, job.output[0]))
                if planned.code_digest not in old:
                    reasons[f"code of {', '.join(families)} (or the shared training code) changed"].add(key)
                if planned.params_json not in old:
                    for unit_model, penalty, section in unit_changes(old, planned.params_json):
                        label = {"model": f"hyperparameters of model {unit_model} changed",
                                 "penalty": f"settings of penalty {penalty} changed"}.get(
                            section, f"{section} settings changed")
                        reasons[label].add(key)
            for city in cities:
                mentioned = f"{plan.cfg.data.clean_dir}/{city}.parquet" in job.reason
                if city in new_data and (mentioned or "splits/" in job.reason):
                    reasons[f"new data for city {city}"].add(key)
                elif city in touched_only and (mentioned or "splits/" in job.reason):
                    reasons[f"raw dump of {city} touched or rewritten identically (re-ingest expected to be "
                            f"byte-identical, then nothing retrains)"].add(key)
                elif mentioned and "Updated input files" in job.reason:
                    reasons[f"clean table of city {city} changed"].add(key)
        elif job.rule in AGGREGATION_RULES and "Params have changed" in job.reason:
            reasons["report options or aggregation code changed"].add(job.rule)
        elif job.rule == "setup_tracking":
            reasons["tracking store settings changed"].add(job.rule)
    lines = []
    for city in sorted(new_data):
        reasons.setdefault(f"new data for city {city}", set())
    for label, members in sorted(reasons.items()):
        if label == "new splits":
            lines.append(f"new splits: {len(new_splits)} ({len(members)} training jobs)")
        elif label.startswith("report options") or label.startswith("tracking") or label.startswith("city "):
            lines.append(label)
        else:
            lines.append(f"{label}: {len(members)} training jobs")
    for city in sorted(touched_only):
        if not any(f"raw dump of {city} " in label for label in reasons):
            lines.append(f"raw dump of {city} touched or rewritten identically: re-ingest only, nothing retrains")
    return lines


def format_status(jobs: list[PlannedJob], reasons: list[str]) -> str:
    if not jobs:
        return "up to date: nothing to run"
    counts = count_by_rule(jobs)
    lines = ["out of date:"] + [f"  - {line}" for line in reasons]
    lines.append("jobs Snakemake would schedule: " + ", ".join(f"{rule} {n}" for rule, n in counts.items()))
    return "\n".join(lines)
