"""Re-train one logged run from its own config on the current data, and compare it with the original.

Reads the original run (tags, metrics, artifacts config/resolved_config.yaml and model/model_state.pt)
from the MLflow store and the current clean Parquet files (`data.clean_dir`). Writes one new run into a
scratch experiment `<experiment>-verify` of the same store; never writes run records under
results/runs (they go to a temporary folder) and never tags anything superseded.
Config keys obeyed: data.clean_dir (where the current data is), tracking.uri. The parent run of a
hyperparameter search is refused (its trials are runs of their own, each verifiable).
"""

from __future__ import annotations

import json
import math
import struct
import tempfile
from pathlib import Path

from pipeline import audit, provenance, tracking
from pipeline.errors import InputError

SCRATCH_SUFFIX = "-verify"


def check_data(then: dict[str, str], now: dict[str, str | None], run_id: str, force: bool) -> list[str]:
    """Cities whose data changed; refuse (InputError) unless forced."""
    changed = audit.changed_cities(then, now)
    if changed and not force:
        raise InputError(f"run {run_id}: the clean data of {', '.join(changed)} changed since it was trained, "
                         f"so a re-run cannot reproduce it; pass --force to re-train on the current data anyway",
                         field="data_digest")
    return changed


def scratch_experiment(client, original_experiment_id: str) -> tuple[str, str]:
    """(name, id) of `<experiment>-verify`; its artifacts sit beside the original experiment's."""
    original = client.get_experiment(original_experiment_id)
    name = f"{original.name}{SCRATCH_SUFFIX}"
    location = original.artifact_location
    artifact_uri = f"{location.rstrip('/')}{SCRATCH_SUFFIX}" if location.startswith("file:") else None
    return name, tracking.ensure_experiment(client, name, artifact_uri)


def retrain(client, run, uri: str, root: Path | str, clean_dir: str, force: bool = False) -> dict:
    """Re-train the run's seed from its logged job slice and split on the current data; return the new record."""
    from pipeline.train_job import run_train_job

    run_id, tags = run.info.run_id, run.data.tags
    if tags.get(tracking.ROLE_TAG) == "parent":  # its rules' results come from different trials: no one fit
        chosen = sorted({v for k, v in tags.items() if k.startswith("search.selected.")})
        raise InputError(f"run {run_id} is the parent of a hyperparameter search and holds its selected trials' "
                         f"results; verify a trial instead: {', '.join(chosen)}", field="run_id")
    logged = audit.resolved_config(client, run_id)
    job, split = logged["job"], logged["split"]
    then = audit.digests_then(tags)
    now = audit.digests_now(list(then), root, clean_dir)
    changed = check_data(then, now, run_id, force)
    clean_paths = {city: str(Path(root) / clean_dir / f"{city}.parquet") for city in then}
    missing = [path for path in clean_paths.values() if not Path(path).exists()]
    if missing:
        raise InputError("clean table is missing; run ingestion first", file=missing[0])
    name, _ = scratch_experiment(client, run.info.experiment_id)
    code_now = provenance.training_code_digest([job["model"]["family"]])
    with tempfile.TemporaryDirectory() as workdir:
        split_path = Path(workdir) / "split.json"
        split_path.write_text(json.dumps(split))
        records = run_train_job(split_path, [{"job": job, "seed": int(tags["seed"])}],
                                [Path(workdir) / "record.json"], uri, name, code_now, clean_paths=clean_paths,
                                supersede=False, reuse=False)
    return {"record": records[0], "experiment": name, "changed_data": changed,
            "code_then": tags.get("family_code_digest", tags.get("code_digest")), "code_now": code_now}


def _bits(value: float) -> bytes:
    return struct.pack("<d", float(value))


def compare_metrics(original: dict[str, float], new: dict[str, float]) -> list[str]:
    """Differences of every non-timing metric, compared bit for bit (NaN equals NaN)."""
    differences = []
    for name in sorted(set(original) | set(new)):
        if name in audit.TIMING_METRICS:
            continue
        if name not in new or name not in original:
            differences.append(f"metric {name}: only in the {'original' if name in original else 'new'} run")
            continue
        a, b = float(original[name]), float(new[name])
        if _bits(a) != _bits(b) and not (math.isnan(a) and math.isnan(b)):
            relative = abs(a - b) / max(abs(a), 1e-300)
            differences.append(f"metric {name}: {a!r} -> {b!r} (relative difference {relative:.2e})")
    return differences


def compare_curves(client, original_id: str, new_id: str, names: list[str]) -> list[str]:
    differences = []
    for name in names:
        a = [(m.step, _bits(m.value)) for m in client.get_metric_history(original_id, name)]
        b = [(m.step, _bits(m.value)) for m in client.get_metric_history(new_id, name)]
        if sorted(a) != sorted(b):
            differences.append(f"curve {name}: {len(a)} vs {len(b)} points, values differ")
    return differences


def load_weights(path: Path) -> dict:
    """A saved state dict through torch's weights-only loader: tensors and plain containers, never an
    arbitrary pickled object (an artifact store is shared; a weights file is not trusted to be harmless)."""
    import pickle

    import torch

    try:
        return torch.load(path, weights_only=True)
    except (pickle.UnpicklingError, RuntimeError, EOFError) as error:
        reason = str(error).strip().splitlines()[0] if str(error).strip() else type(error).__name__
        raise InputError(f"not a plain weights file; torch's weights-only loader refused it ({reason})",
                         file=str(path), field="model_state.pt") from None


def compare_weights(original_path: Path, new_path: Path) -> list[str]:
    """Tensor-by-tensor exact equality of two saved state dicts."""
    import torch

    a, b = load_weights(original_path), load_weights(new_path)
    differences = [f"weights {key}: only in the {'original' if key in a else 'new'} run"
                   for key in sorted(set(a) ^ set(b))]
    for key in sorted(set(a) & set(b)):
        x, y = a[key], b[key]
        if x.shape != y.shape or x.dtype != y.dtype:
            differences.append(f"weights {key}: shape/dtype {tuple(x.shape)} {x.dtype} -> {tuple(y.shape)} {y.dtype}")
        elif not torch.equal(x, y):
            gap = (x.double() - y.double()).abs().max().item() if x.is_floating_point() else float("nan")
            differences.append(f"weights {key}: differ (largest absolute difference {gap:.3g})")
    return differences


def compare_runs(client, original_id: str, new_id: str) -> list[str]:
    """Every difference between two runs' weights, metrics and curves; [] means identical."""
    original, new = client.get_run(original_id), client.get_run(new_id)
    with tempfile.TemporaryDirectory() as workdir:
        first = audit.download_artifact(client, original_id, audit.MODEL_ARTIFACT, Path(workdir) / "a")
        second = audit.download_artifact(client, new_id, audit.MODEL_ARTIFACT, Path(workdir) / "b")
        differences = compare_weights(first, second)
    differences += compare_metrics(original.data.metrics, new.data.metrics)
    curves = sorted(k for k in set(original.data.metrics) | set(new.data.metrics) if k.startswith("curve."))
    return differences + compare_curves(client, original_id, new_id, curves)


def verify_run(client, run, uri: str, root: Path | str, clean_dir: str, force: bool = False) -> dict:
    outcome = retrain(client, run, uri, root, clean_dir, force)
    outcome["differences"] = compare_runs(client, run.info.run_id, outcome["record"]["run_id"])
    return outcome


def format_outcome(run_id: str, outcome: dict) -> str:
    new_id = outcome["record"]["run_id"]
    lines = [f"original run {run_id}", f"re-trained  {new_id} (experiment {outcome['experiment']})"]
    if outcome["changed_data"]:
        lines.append(f"WARNING: forced on changed data of {', '.join(outcome['changed_data'])}")
    if outcome["code_then"] != outcome["code_now"]:
        lines.append(f"note: training code digest changed {outcome['code_then']} -> {outcome['code_now']}")
    lines.append(f"timing metrics ({', '.join(audit.TIMING_METRICS)}) are not compared")
    if not outcome["differences"]:
        lines.append("identical: weights (every tensor) and every metric and curve are bitwise equal")
    else:
        lines.append(f"{len(outcome['differences'])} differences:")
        lines += [f"  {line}" for line in outcome["differences"]]
    return "\n".join(lines)
