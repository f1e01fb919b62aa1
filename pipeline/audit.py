"""Audit by run ID: everything recorded about one MLflow run, checked against what is on disk now.

Reads the MLflow store named by `tracking.uri` (default: SQLite under `results_dir`), the run's artifact
config/resolved_config.yaml ({job, split}), the run records under `<results_dir>/runs/` and the current
clean Parquet files (`data.clean_dir`) to compare data digests then vs now. Writes nothing.
Config keys obeyed: results_dir, tracking.uri, tracking.experiment, data.clean_dir.
"""

from __future__ import annotations

import json
import tempfile
from datetime import datetime, timezone
from pathlib import Path

import yaml

from pipeline import environments, provenance, tracking
from pipeline.errors import InputError

CONFIG_ARTIFACT = "config/resolved_config.yaml"
MODEL_ARTIFACT = "model/model_state.pt"
TIMING_METRICS = ("fit_seconds", "compute_seconds", "prepare_seconds")
DIGEST_TAG = "data_digest."


def tracking_uri_for(root: Path | str, overrides: list[str], explicit: str | None = None) -> tuple[str, object]:
    """(tracking URI, composed config): --tracking-uri wins, else the config's store under results_dir."""
    from pipeline.workflow import plan_config  # the cached plan's config when there is one: no Hydra

    cfg = plan_config(list(overrides or []), root)
    uri = explicit or tracking.resolve_tracking_uri(cfg.tracking.uri, Path(root) / cfg.results_dir)
    return uri, cfg


def get_run(client, run_id: str):
    """The run with this ID; a unique prefix (>= 6 characters) of an ID in any experiment also works."""
    from mlflow.exceptions import MlflowException

    run_id = run_id.strip()
    try:
        return client.get_run(run_id)
    except MlflowException:
        pass
    if len(run_id) >= 6 and run_id.isalnum():
        experiments = [e.experiment_id for e in client.search_experiments()]
        found = [r for r in tracking.search_all_runs(client, experiments) if r.info.run_id.startswith(run_id)]
        if len(found) == 1:
            return found[0]
        if len(found) > 1:
            raise InputError(f"run id prefix {run_id!r} matches {len(found)} runs; give more characters",
                             field="RUN_ID")
    if len(run_id) < 6:
        raise InputError(f"run id prefix {run_id!r} is too short: give at least 6 characters of the run ID",
                         field="RUN_ID")
    raise InputError(f"no MLflow run with id {run_id!r} in this tracking store", field="RUN_ID")


def experiment_overrides(root: Path | str) -> dict[str, str]:
    """MLflow experiment name -> the `experiment=NAME` override whose config file selects it."""
    import yaml

    found = {}
    for path in sorted((Path(root) / "config" / "experiment").glob("*.yaml")):
        tracking_cfg = (yaml.safe_load(path.read_text(encoding="utf-8")) or {}).get("tracking") or {}
        if tracking_cfg.get("experiment"):
            found[tracking_cfg["experiment"]] = f"experiment={path.stem}"
    return found


def find_experiment(client, name: str, root: Path | str):
    """The MLflow experiment `name`; when missing, the error names the override that finds the stored ones."""
    experiment = client.get_experiment_by_name(name)
    if experiment is not None:
        return experiment
    overrides = experiment_overrides(root)
    stored = [e.name for e in client.search_experiments()]
    hints = [f"{overrides[n]} (MLflow experiment {n!r})" for n in stored if n in overrides]
    others = [repr(n) for n in stored if n not in overrides and n != "Default"]
    hint = ("; pass " + " or ".join(hints) if hints else "") + \
           (f"; other experiments in the store: {', '.join(others)} (--experiment NAME)" if others else "")
    raise InputError(f"no MLflow experiment {name!r} in this tracking store{hint or '; it holds no runs yet'}",
                     field="tracking.experiment")


def download_artifact(client, run_id: str, path: str, workdir: Path | str) -> Path:
    from mlflow.exceptions import MlflowException

    try:
        return Path(client.download_artifacts(run_id, path, str(workdir)))
    except (MlflowException, OSError) as error:  # missing artifact: MLflow's own error or a missing file
        moved = moved_artifact(client, run_id, path)
        if moved is not None:
            return moved
        raise InputError(f"run {run_id} has no readable artifact {path}: {str(error).splitlines()[0]}",
                         field="artifacts") from None


def moved_artifact(client, run_id: str, path: str) -> Path | None:
    """The artifact in a project folder that moved since the run: a SQLite store's artifacts sit beside it
    (results_dir/mlartifacts), while the store still names the old absolute place. None when not found."""
    store = tracking.sqlite_path(client.tracking_uri)
    if store is None:
        return None
    folder = tracking.local_artifacts(client.get_run(run_id).info.artifact_uri, store.resolve().parent / "mlartifacts")
    return folder / path if (folder / path).is_file() else None


def resolved_config(client, run_id: str) -> dict:
    """The run's logged {job, split} (artifact config/resolved_config.yaml)."""
    with tempfile.TemporaryDirectory() as workdir:
        text = download_artifact(client, run_id, CONFIG_ARTIFACT, workdir).read_text()
    try:
        logged = yaml.safe_load(text) or {}
    except yaml.YAMLError as error:  # a damaged or tampered artifact: say which, in one line
        raise InputError(f"run {run_id}: {CONFIG_ARTIFACT} is not readable YAML "
                         f"({str(error).splitlines()[0]})", field=CONFIG_ARTIFACT) from None
    if not isinstance(logged, dict) or "job" not in logged or "split" not in logged:
        raise InputError(f"run {run_id}: {CONFIG_ARTIFACT} lacks 'job' or 'split'", field=CONFIG_ARTIFACT)
    return logged


def digests_then(tags: dict) -> dict[str, str]:
    return {k[len(DIGEST_TAG):]: v for k, v in sorted(tags.items()) if k.startswith(DIGEST_TAG)}


def digests_now(cities: list[str], root: Path | str, clean_dir: str) -> dict[str, str | None]:
    """sha256 of each city's current clean Parquet (None where the file is gone)."""
    now = {}
    for city in cities:
        path = Path(root) / clean_dir / f"{city}.parquet"
        now[city] = provenance.file_digest(path) if path.exists() else None
    return now


def changed_cities(then: dict[str, str], now: dict[str, str | None]) -> list[str]:
    return sorted(city for city, digest in then.items() if now.get(city) != digest)


def find_record(results_dir: Path | str, run_id: str) -> tuple[Path | None, dict | None]:
    """The run record under results_dir/runs that names this run (None when no record does)."""
    for path in sorted((Path(results_dir) / "runs").rglob("*.json")):
        try:
            record = json.loads(path.read_text())
        except (OSError, json.JSONDecodeError):
            continue
        if record.get("run_id") == run_id or run_id in (record.get("supersedes") or []):
            return path, record
    return None, None


def list_artifacts(client, run_id: str, path: str | None = None) -> list[str]:
    files = []
    for item in client.list_artifacts(run_id, path):
        files.extend(list_artifacts(client, run_id, item.path) if item.is_dir else [item.path])
    return files


def when(millis: int | None) -> str:
    if not millis:
        return "-"
    return datetime.fromtimestamp(millis / 1000, tz=timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")


def describe_run(client, run, root: Path | str, results_dir: str, clean_dir: str) -> dict:
    """Everything `shiftgrid show` prints, as data."""
    tags, run_id = run.data.tags, run.info.run_id
    logged = resolved_config(client, run_id)
    then = digests_then(tags)
    now = digests_now(list(then), root, clean_dir)
    record_path, record = find_record(Path(root) / results_dir, run_id)
    successor = tags.get(tracking.SUPERSEDED_TAG)
    return {
        "run_id": run_id, "experiment_id": run.info.experiment_id, "status": run.info.status,
        "started": when(run.info.start_time), "run_name": run.info.run_name,
        "identity": {k: tags.get(k) for k in ("split_id", "model", "family", "penalty", "seed", "selection_rule",
                                               "selection_label", "sampling")},
        "split": {k: logged["split"].get(k) for k in ("split_id", "scheme", "sources", "target", "environment",
                                                      "environment_fallback_from", "time_blocks", "gap_hours",
                                                      "target_train_fraction")},
        "config": logged,
        "data_then": then, "data_now": now, "data_changed": changed_cities(then, now),
        "code_digest": tags.get("code_digest"), "package_digest": tags.get("package_digest"),
        "git": {k[4:]: v for k, v in tags.items() if k.startswith("git.")},
        "versions": {k[8:]: v for k, v in sorted(tags.items()) if k.startswith("version.")},
        "metrics": dict(run.data.metrics), "artifacts": list_artifacts(client, run_id),
        "record_path": str(record_path) if record_path else None,
        "record_is_this_run": bool(record and record.get("run_id") == run_id),
        "record_run_id": record.get("run_id") if record else None,
        "superseded_by": successor,
    }


def ordered_metrics(metrics: dict[str, float]) -> list[tuple[str, float]]:
    """Headline metrics first (in tracking.HEADLINE_METRICS order), then the rest by name."""
    head = [(k, metrics[k]) for k in tracking.HEADLINE_METRICS if k in metrics]
    return head + sorted((k, v) for k, v in metrics.items() if k not in tracking.HEADLINE_METRICS)


SCREEN_COLUMNS = 100


def fit_to_screen(lines: list[str], width: int = SCREEN_COLUMNS) -> str:
    """Wrap lines longer than the screen under their own indentation plus four spaces; a single word longer
    than the screen (a path, a digest) is kept whole so it can be copied."""
    import textwrap

    out = []
    for line in lines:
        indent = " " * (len(line) - len(line.lstrip()) + 4)
        out.extend(textwrap.wrap(line, width, subsequent_indent=indent, break_long_words=False,
                                 break_on_hyphens=False) if len(line) > width else [line])
    return "\n".join(out)


def format_show(info: dict, all_metrics: bool = False) -> str:
    ident, split = info["identity"], info["split"]
    lines = [f"run {info['run_id']}  ({info['run_name']}, {info['status']}, started {info['started']})"]
    if info["superseded_by"]:
        lines.append(f"state: SUPERSEDED by run {info['superseded_by']} (kept for audit; the grid uses the newer run)")
    else:
        lines.append("state: current")
    lines += ["", "split",
              f"  id          {split['split_id']}  (scheme {split['scheme']}, environments: "
              f"{environments.describe(split)})",
              f"  sources     {', '.join(split['sources'] or [])}",
              f"  target      {split['target']}"]
    blocks = split.get("time_blocks") or {}
    for block in sorted(blocks, key=lambda name: ("train", "val", "test").index(name) if name in
                        ("train", "val", "test") else 3):
        start, end = blocks[block]
        lines.append(f"  {block:<11} {start} .. {end} (end exclusive)")
    lines.append(f"  gap hours   {split['gap_hours']}; target train fraction {split['target_train_fraction']}")
    lines += ["", "model",
              f"  {ident['model']} (family {ident['family']}), penalty {ident['penalty']}, seed {ident['seed']}",
              f"  selection   {ident['selection_label'] or ident['selection_rule']}",
              # runs logged before fit.sampling existed drew balanced batches
              f"  sampling    {ident.get('sampling') or 'balanced (not tagged)'}"]
    lines += ["", "data digests (sha256 of the clean Parquet: when trained -> now)"]
    for city, digest in info["data_then"].items():
        now = info["data_now"].get(city)
        state = "same" if now == digest else ("MISSING now" if now is None else f"CHANGED now {now[:12]}")
        lines.append(f"  {city:<12} {digest[:12]} -> {state}")
    if info["data_changed"]:
        lines.append(f"WARNING: the data of {', '.join(info['data_changed'])} changed since this run was "
                     f"trained; its numbers describe the old data")
    git = info["git"]
    lines += ["", "code",
              f"  code digest    {info['code_digest']}",
              f"  package digest {info['package_digest']}",
              f"  git commit  {git.get('commit', 'unknown')}  (uncommitted changes: {git.get('dirty', 'unknown')})",
              "  versions    " + ", ".join(f"{k} {v}" for k, v in info["versions"].items())]
    lines += ["", "resolved config (artifact config/resolved_config.yaml, job slice)"]
    lines += ["  " + line for line in yaml.safe_dump(info["config"]["job"], sort_keys=True).splitlines()]
    metrics = ordered_metrics(info["metrics"])
    shown = metrics if all_metrics else metrics[:len([k for k in tracking.HEADLINE_METRICS if k in info["metrics"]]) + 12]
    lines += ["", f"metrics ({len(metrics)} logged{'' if all_metrics else '; --all-metrics for every one'})"]
    lines += [f"  {name:<44} {value:.6g}" for name, value in shown]
    lines += ["", "artifacts"] + [f"  {path}" for path in info["artifacts"]]
    lines += ["", "run record"]
    if info["record_path"] is None:
        lines.append("  none under results/runs names this run")
    elif info["record_is_this_run"]:
        lines.append(f"  {info['record_path']}")
    else:
        lines.append(f"  {info['record_path']} now names run {info['record_run_id']} (this run is superseded)")
    return fit_to_screen(lines)
