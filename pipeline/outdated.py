"""What is out of date and why: Snakemake's dry-run job list turned into plain reasons.

Reads the text of `snakemake -n` (one block per job: rule, output, reason, wildcards), Snakemake's stored
job metadata (.snakemake/metadata/<base64 of the output path>: the params of the last execution and the
sha256 of each input), the raw dumps and the library versions each finished job recorded beside its log
(`<results_dir>/logs/**/*.versions.json`, pipeline.scripts._step). Writes nothing. Obeys
tracking.dependency_changes: with "report" (default) a changed library version is a note and nothing
re-runs for it; with "rerun" the versions are params, so Snakemake re-runs and the reason names them. `--list-changes params` lists every output in
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

from pipeline import provenance
from pipeline.errors import InputError
from pipeline.provenance import file_digest
from pipeline.workflow import BASELINES

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


def _sections(unit: dict) -> dict:
    """A unit's config slice sections, plus its hyperparameter search's trials (pipeline.search) if any."""
    return {**unit["job"], **({"search": unit["search"]} if unit.get("search") else {})}


def unit_changes(old: list, new_json: str) -> list[tuple[str, str, str]]:
    """(model, penalty, section) for every unit whose config slice section differs from the last run."""
    new = {_unit_key(u): _sections(u) for u in json.loads(new_json)}
    before = None
    for value in old:
        if isinstance(value, str) and value.startswith("[") and '"model_name"' in value:
            before = {_unit_key(u): _sections(u) for u in json.loads(value)}
    if before is None:
        return [("?", "?", "job settings")]
    changes = set()
    for key, job in new.items():
        previous = before.get(key)
        sections = ["new run"] if previous is None else [k for k in set(job) | set(previous)
                                                        if job.get(k) != previous.get(k)]
        changes.update((key[0], key[1], section) for section in sections)
    return sorted(changes)


def stored_versions(old: list) -> dict | None:
    """The `versions` param of the last execution (JSON with a "python" key), if it had one."""
    for value in old:
        if isinstance(value, str) and value.startswith("{") and '"python"' in value:
            return json.loads(value)
    return None


def version_changes(before: dict | None, now: dict) -> str:
    """`torch 2.12.0 -> 2.13.0, numpy ...` for the libraries whose version differs (new ones included)."""
    before = before or {}
    return ", ".join(f"{name} {before.get(name, 'unrecorded')} -> {version}" for name, version in sorted(now.items())
                     if before.get(name) != version)


def _versions_changed(job: PlannedJob, planned_versions: str, root: Path | str) -> str | None:
    """The changed libraries when this job re-runs because versions its code imports changed."""
    if not planned_versions:
        return None
    old = stored_params(stored_metadata(root, job.output[0])) if job.output else []
    if planned_versions in old:
        return None
    return version_changes(stored_versions(old), json.loads(planned_versions)) or None


def recorded_version_notes(results_dir: Path) -> list[str]:
    """With tracking.dependency_changes=report: libraries whose installed version differs from the one
    finished jobs ran with (only libraries the job's rule imports), with how many jobs of each rule."""
    now = provenance.result_versions()
    changes: dict[str, Counter] = defaultdict(Counter)
    for path in sorted((results_dir / "logs").rglob("*.versions.json")):
        try:
            record = json.loads(path.read_text())
            rule, then = record["rule"], record["versions"]
        except (OSError, ValueError, KeyError, TypeError):
            continue  # a damaged record only loses its note
        differing = {name for name, version in now.items() if then.get(name) not in (None, version)}
        if not differing:
            continue
        try:
            used = set(provenance.rule_dependencies(rule))
        except InputError:
            used = differing  # a rule without a script any more: report every difference
        for name in sorted(differing & used):
            changes[f"{name} {then[name]} -> {now[name]}"][rule] += 1
    return [f"{change}: {sum(rules.values())} jobs ran with the older version "
            f"({', '.join(f'{rule} {n}' for rule, n in sorted(rules.items()))})"
            for change, rules in sorted(changes.items())]


def explain(jobs: list[PlannedJob], plan, root: Path | str) -> list[str]:
    """Plain reasons, one line each, with how many jobs each one brings."""
    reasons: dict[str, set] = defaultdict(set)
    plain = set()  # labels printed without a count of training jobs
    touched_only, new_data, new_splits = set(), set(), set()
    for job in jobs:
        if job.rule == "ingest_city":
            city = job.wildcards.get("city", "?")
            meta = stored_metadata(root, job.output[0]) if job.output else None
            if "Missing output" in job.reason:
                reasons[f"city {city} not ingested yet"].add(city)
            elif "Params have changed" in job.reason or "Code has changed" in job.reason:
                versions = _versions_changed(job, plan.versions(job.rule), root)
                label = (f"ingestion: library versions changed ({versions})" if versions
                         else f"ingestion settings or code of city {city} changed")
                reasons[label].add(city)
                plain.add(label)
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
            split_id = job.wildcards.get("split_id", "?")
            model = job.wildcards.get("model", BASELINES)  # a split's baselines job has no model wildcard
            variable = job.wildcards.get("variable")  # with several forecast targets
            planned = plan.jobs.get((split_id, model, variable) if variable else (split_id, model))
            families = sorted({u["job"]["model"]["family"] for u in planned.units}) if planned else ["?"]
            cities = plan.split_cities(split_id) if split_id in plan.splits else []
            if split_id in new_splits:
                reasons["new splits"].add(key)
                continue
            if "Missing output" in job.reason:
                reasons[f"never trained: model {model}"].add(key)
                continue
            if "Params have changed" in job.reason and planned is not None:
                old = stored_params(stored_metadata(root, job.output[0]))
                versions = _versions_changed(job, planned.versions, root)
                if versions:
                    reasons[f"library versions changed ({versions})"].add(key)
                if planned.code_digest not in old:
                    reasons[f"code of {', '.join(families)} (or the shared training code) changed"].add(key)
                if planned.params_json not in old:
                    for unit_model, penalty, section in unit_changes(old, planned.params_json):
                        label = {"model": f"hyperparameters of model {unit_model} changed",
                                 "penalty": f"settings of penalty {penalty} changed",
                                 "search": f"hyperparameter search of {unit_model} + {penalty} changed"}.get(
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
            versions = _versions_changed(job, plan.versions(job.rule), root)
            label = (f"{job.rule}: library versions changed ({versions})" if versions
                     else "report options or aggregation code changed")
            reasons[label].add(job.rule)
            plain.add(label)
        elif job.rule == "setup_tracking":
            reasons["tracking store settings changed"].add(job.rule)
    lines = []
    for city in sorted(new_data):
        reasons.setdefault(f"new data for city {city}", set())
    for label, members in sorted(reasons.items()):
        if label == "new splits":
            lines.append(f"new splits: {len(new_splits)} ({len(members)} training jobs)")
        elif label in plain or label.startswith("tracking") or label.startswith("city "):
            lines.append(label)
        else:
            lines.append(f"{label}: {len(members)} training jobs")
    for city in sorted(touched_only):
        if not any(f"raw dump of {city} " in label for label in reasons):
            lines.append(f"raw dump of {city} touched or rewritten identically: re-ingest only, nothing retrains")
    return lines


def format_status(jobs: list[PlannedJob], reasons: list[str], notes: list[str] = ()) -> str:
    """The status text; `notes`: library versions changed under tracking.dependency_changes=report."""
    if not jobs:
        lines = ["up to date: nothing to run"]
    else:
        lines = ["out of date:"] + [f"  - {line}" for line in reasons]
        lines.append("jobs Snakemake would schedule: " + ", ".join(f"{rule} {n}" for rule, n in
                                                                     count_by_rule(jobs).items()))
    if notes:
        lines.append("library versions changed since these jobs ran (not re-run: tracking.dependency_changes="
                     "report; set it to rerun to re-run them):")
        lines += [f"  - {note}" for note in notes]
    return "\n".join(lines)
