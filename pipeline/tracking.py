"""MLflow bookkeeping: the store, the experiment, logging one run in batches, superseding old runs.

Writes to the MLflow tracking store named by `tracking.uri` (default: SQLite file
`<results_dir>/mlflow.db`, artifacts under `<results_dir>/mlartifacts`). Jobs and run records name the
default store relative to the project folder (`project_store_uri`), so a copied or moved project keeps
using its own store; commands resolve it against `--root` (`resolve_tracking_uri`).
A fresh SQLite store opened by parallel jobs breaks, so `setup_store` runs once, in its
own rule, before any training job. Every call goes through an explicit MlflowClient (no global run).
A team store (an MLflow server, or a database every node reaches) is `tracking.uri` or, when that is
unset, MLflow's own MLFLOW_TRACKING_URI, which cluster jobs inherit. Credentials in a URI never reach a
file, param, tag or message: everything stored or shown is `redact`ed, and `client_for` takes the
credentials back from MLFLOW_TRACKING_URI (`connection_uri`).
"""

from __future__ import annotations

import os
import re
import time
from pathlib import Path
from typing import Iterable
from urllib.parse import unquote, urlparse

from pipeline.errors import InputError

RUN_IDENTITY_TAGS = ("split_id", "model", "penalty", "seed")
SUPERSEDED_TAG = "superseded_by"
# The forecast variable completes a run's identity when a sweep has several (`target=pm25,no2`): runs of
# another variable never supersede each other. Runs logged before the tag existed carry none.
FORECAST_TARGET_TAG = "forecast_target"
# Hyperparameter search (pipeline.search): a trial's searched values (canonical JSON) complete its identity,
# so trials of other values never supersede each other; ROLE_TAG is "trial" or "parent" (the run the grid
# reads, holding the selected trial's results); trials point at their parent with MLflow's own tag.
TRIAL_TAG = "search.trial"
ROLE_TAG = "search.role"
PARENT_TAG = "mlflow.parentRunId"
# The metrics a run record carries and `show` lists first (the one list of them).
HEADLINE_METRICS = ("target_mae", "target_rmse", "target_mse", "target_mase", "target_csi", "source_mae", "gap_mae",
                    "worst_source_env_mse")
# MLflow's log_batch limits per call (documented): 1000 metrics, 100 params, 100 tags.
_BATCH = {"metrics": 1000, "params": 100, "tags": 100}


ENV_URI = "MLFLOW_TRACKING_URI"
SQLITE = "sqlite:///"  # scheme of the default store; SQLAlchemy reads the path after it
STORE_FILE = "mlflow.db"  # the default store's file under results_dir
# Shell- and Hydra-safe (no quoting needed when the URI travels in an override on a command line).
REDACTED = "REDACTED"
# user:password@ (or a bare token@) after a scheme, and secret-looking query parameters, anywhere in a text.
_USERINFO = re.compile(r"(?P<scheme>\b[A-Za-z][A-Za-z0-9+.-]*://)(?P<userinfo>[^/@\s'\"]+)@")
_QUERY_SECRET = re.compile(r"(?P<key>[?&](?:password|passwd|pwd|token|access_token|secret|api_key)=)[^&\s'\"]+",
                           re.IGNORECASE)


def redact(text: str) -> str:
    """`text` (a URI, a message, a traceback) with every credential in a URI replaced by REDACTED: the one
    helper for whatever is stored or shown. Keeps the user name, so the store stays recognisable."""
    def userinfo(match: re.Match) -> str:
        user, has_password, _ = match["userinfo"].partition(":")
        return f"{match['scheme']}{user + ':' if has_password else ''}{REDACTED}@"

    return _QUERY_SECRET.sub(lambda m: m["key"] + REDACTED, _USERINFO.sub(userinfo, str(text)))


def configured_uri(uri: str | None) -> str | None:
    """The store the user chose: `tracking.uri`, else MLFLOW_TRACKING_URI, else None (the project's SQLite)."""
    return uri or os.environ.get(ENV_URI) or None


def connection_uri(uri: str) -> str:
    """The URI to connect with. A redacted one gets its credentials back from MLFLOW_TRACKING_URI when that
    names the same store: credentials live in the environment only, never in a file or a command line."""
    if REDACTED not in uri:
        return uri
    full = os.environ.get(ENV_URI, "")
    if full and redact(full) == uri:
        return full
    raise InputError(f"tracking store {uri} needs its credentials, which are kept out of every file and log: "
                     f"set {ENV_URI} to the full URI in the environment of this process (cluster jobs "
                     f"inherit it)", field="tracking.uri")


def hide_credentials(overrides: list[str], env: dict[str, str]) -> list[str]:
    """A `tracking.uri=` override carrying credentials travels in `env` (MLFLOW_TRACKING_URI) instead, and
    the override keeps the redacted URI: Snakemake logs its command line, and SLURM jobs repeat it."""
    hidden = []
    for override in overrides:
        key, equals, value = override.partition("=")
        if equals and key.lstrip("+") == "tracking.uri" and redact(value) != value:
            env[ENV_URI] = value
            override = f"{key}={redact(value)}"
        hidden.append(override)
    return hidden


def is_server(uri: str) -> bool:
    return uri.startswith(("http://", "https://"))


def sqlite_path(uri: str) -> Path | None:
    """The database file of a `sqlite:///PATH` URI (absolute or relative to the working folder), else None."""
    return Path(uri[len(SQLITE):].split("?", 1)[0]) if uri.startswith(SQLITE) else None


def open_existing_store(uri: str, *, file: str | None = None, field: str = "tracking.uri"):
    """A client on a store that is there: MLflow would silently create an empty SQLite file, so a missing
    one is an InputError naming it (and `file`, the record or setting that pointed at it)."""
    path = sqlite_path(uri)
    if path is not None and not path.exists():
        raise InputError(f"tracking store {path} does not exist; run the pipeline first or pass --tracking-uri",
                         file=file, field=field)
    return client_for(uri)


def project_store_uri(uri: str | None, results_dir: Path | str) -> str:
    """The configured store, or the default SQLite store as the project folder's jobs see it: relative to
    the folder they run in (SQLAlchemy reads `sqlite:///results/mlflow.db` relative to the working
    directory), so nothing in a job's inputs or records names where the folder sits."""
    uri = configured_uri(uri)
    if uri:
        return redact(uri)
    return f"{SQLITE}{(Path(results_dir) / STORE_FILE).as_posix()}"


def resolve_tracking_uri(uri: str | None, results_dir: Path | str) -> str:
    """The same store with an absolute path, for a process that may run anywhere (commands, tests)."""
    uri = configured_uri(uri)
    if uri:
        return uri
    return f"{SQLITE}{Path(results_dir).resolve() / STORE_FILE}"


def artifact_location(results_dir: Path | str) -> str:
    return (Path(results_dir).resolve() / "mlartifacts").as_uri()


def local_artifacts(artifact_uri: str, project_artifacts: Path | None) -> Path:
    """A local run's artifact folder. The store keeps absolute paths, so in a project folder that was moved,
    copied or mounted elsewhere a folder that is not where the store says is looked up at the same place
    under this project's own mlartifacts/ (`project_artifacts`)."""
    path = Path(unquote(urlparse(artifact_uri).path))
    if path.exists() or project_artifacts is None or "mlartifacts" not in path.parts:
        return path
    tail = path.parts[len(path.parts) - path.parts[::-1].index("mlartifacts"):]
    return Path(project_artifacts).joinpath(*tail)


def search_all_runs(client, experiment_ids: list[str], filter_string: str = "") -> list:
    """Every run matching `filter_string`, following MLflow's result pages (the one pager: a single
    search_runs call stops at its max_results)."""
    runs, token = [], None
    while experiment_ids:
        page = client.search_runs(experiment_ids, filter_string, max_results=1000, page_token=token)
        runs.extend(page)
        token = page.token
        if not token:
            break
    return runs


def client_for(uri: str):
    from mlflow.tracking import MlflowClient

    # Finishing a run on a server prints "View run ... at: <tracking URI>" (credentials included) and costs
    # one more request per run: off.
    os.environ.setdefault("MLFLOW_SUPPRESS_PRINTING_URL_TO_STDOUT", "true")
    return MlflowClient(tracking_uri=connection_uri(uri))


def setup_store(uri: str, experiment: str, artifact_uri: str) -> str:
    """Create the store (schema migration happens here, in one process) and the experiment; return its id.
    On a tracking server the server places artifacts (its --artifacts-destination, a path it and every
    user reach); `artifact_uri` (a folder of this project) is for a store without a server."""
    return ensure_experiment(client_for(uri), experiment, None if is_server(uri) else artifact_uri)


def ensure_experiment(client, experiment: str, artifact_uri: str | None) -> str:
    """The id of the experiment `experiment`, created with its artifacts under `artifact_uri` when missing."""
    found = client.get_experiment_by_name(experiment)
    if found is not None:
        return found.experiment_id
    return client.create_experiment(experiment, artifact_location=artifact_uri)


def experiment_id(client, experiment: str) -> str:
    found = client.get_experiment_by_name(experiment)
    if found is None:
        raise InputError(f"MLflow experiment {experiment!r} does not exist; run the setup_tracking rule first",
                         field="tracking.experiment")
    return found.experiment_id


def flatten(tree: dict, prefix: str = "") -> dict[str, str]:
    """Nested config -> {'model.hidden_size': '32', ...} (MLflow params are strings)."""
    flat = {}
    for key, value in tree.items():
        name = f"{prefix}{key}"
        if isinstance(value, dict) and value:
            flat.update(flatten(value, f"{name}."))
        else:
            flat[name] = str(value)
    return flat


def _chunks(items: list, size: int) -> Iterable[list]:
    for start in range(0, len(items), size):
        yield items[start:start + size]


def log_run(client, experiment_id_: str, *, run_name: str, params: dict[str, str],
            metrics: dict[str, float], curves: dict[str, list[tuple[int, float]]], tags: dict[str, str],
            artifacts: dict[str, Path], run_id: str | None = None) -> str:
    """Create (unless `run_id` names a started run), fill and finish one run with batched calls (one HTTP
    request per batch on a server)."""
    from mlflow.entities import Metric, Param, RunTag

    if run_id is None:
        run_id = client.create_run(experiment_id_, run_name=run_name,
                                   tags={k: str(v) for k, v in tags.items()}).info.run_id
    else:
        for batch in _chunks([RunTag(k, str(v)) for k, v in sorted(tags.items())], _BATCH["tags"]):
            client.log_batch(run_id, tags=batch)
    now = int(time.time() * 1000)
    metric_rows = [Metric(k, float(v), now, 0) for k, v in sorted(metrics.items())]
    metric_rows += [Metric(k, float(v), now, int(step)) for k, points in sorted(curves.items())
                    for step, v in points]
    for batch in _chunks(metric_rows, _BATCH["metrics"]):
        client.log_batch(run_id, metrics=batch)
    for batch in _chunks([Param(k, v[:6000]) for k, v in sorted(params.items())], _BATCH["params"]):
        client.log_batch(run_id, params=batch)
    for name, path in artifacts.items():
        client.log_artifact(run_id, str(path), artifact_path=name)
    client.set_terminated(run_id, "FINISHED")
    return run_id


def find_current_run(client, experiment_id_: str, unit_digest: str):
    """A finished, not superseded run logged with this unit digest, or None."""
    runs = search_all_runs(client, [experiment_id_], f"tags.unit_digest = '{unit_digest}'")
    current = [r for r in runs if r.info.status == "FINISHED" and SUPERSEDED_TAG not in r.data.tags]
    return current[0] if current else None


def supersede_previous(client, experiment_id_: str, identity: dict[str, str], new_run_id: str) -> list[str]:
    """Tag earlier current runs of the same split/model/penalty/seed as superseded (never deleted). A search
    trial (TRIAL_TAG, read from the new run itself) supersedes only earlier trials of the same values; any
    other run supersedes only runs that are not trials; no run supersedes one of another forecast variable
    (a run without the tag, logged before it existed, counts as the same variable)."""
    clauses = [f"tags.{key} = '{identity[key]}'" for key in RUN_IDENTITY_TAGS]
    older = search_all_runs(client, [experiment_id_], " and ".join(clauses))
    new_tags = client.get_run(new_run_id).data.tags
    trial, variable = new_tags.get(TRIAL_TAG), new_tags.get(FORECAST_TARGET_TAG)
    superseded = []
    for run in older:
        if run.data.tags.get(TRIAL_TAG) != trial:
            continue
        if run.data.tags.get(FORECAST_TARGET_TAG, variable) != variable:  # another forecast variable
            continue
        if run.info.run_id != new_run_id and SUPERSEDED_TAG not in run.data.tags:
            client.set_tag(run.info.run_id, SUPERSEDED_TAG, new_run_id)
            superseded.append(run.info.run_id)
    return superseded
