"""Aggregation: run records + MLflow -> the grid tables (I/O shell around pipeline.grid_stats).

Reads the run records results/runs/[<forecast variable>/]<split_id>/<model>/<penalty>/<seed>.json (the
variable folder only when several are swept), the MLflow runs they name
(via each record's tracking_uri; for a searched run the parent, and its trials for grid_trials.csv) and each run's predictions artifact
(predictions/target_predictions.parquet). Writes, in the results folder:
- grid.parquet: one row per current run: identity, every logged metric (`<rule>.<name>` and the
  un-prefixed primary ones), every tag (`tag.<name>`) and param (`param.<name>`);
- grid.csv: the summary per split x model x penalty for every selection rule that was logged
  (pipeline.grid_stats.summarise), the Diebold-Mariano columns and the origin intervals joined in;
- grid_dm.csv: the Diebold-Mariano + HLN tests of each penalty against its ERM twin, per rule and loss
  (absolute, squared, scaled absolute), with Holm-adjusted p-values (pipeline.window_stats);
- grid_intervals.csv: the 95 % moving-block bootstrap interval over test origins of every cell, per rule
  and resamplable metric (mae, mse, rmse, mase), so `shiftgrid grid --metric` needs no artifact;
- grid_trials.csv: every hyperparameter-search trial behind a run of the grid (pipeline.trial_table; no rows
  without a search): its values, the rules that selected it, its selection scores and target metric;
- grid_meta.json: metric, rules, Friedman/Iman-Davenport/Nemenyi per rule, skipped runs and why.
With several forecast variables (`target=pm25,no2`, pipeline.target_sections) every statistic is computed
within each variable's runs, the tables carry the variable in a `target_variable` column, and
grid_meta.json holds each variable's metric label and Friedman results under `targets`.
Config keys obeyed (handed over by the rule): report.metric, report.bootstrap_samples.

A record whose run is missing, unfinished, in another experiment or whose headline metrics differ from
the logged ones is an InputError naming the run id and the record file. A record whose run carries the
`superseded_by` tag is skipped and counted (the grid uses current runs only).
"""

from __future__ import annotations

import functools
import json
import math
import tempfile
from pathlib import Path
from urllib.parse import urlparse

import numpy as np
import pandas as pd
import pyarrow as pa

from pipeline import environments, grid_stats, names, stats, target_sections, tracking, trial_table, window_stats
from pipeline.atomic import write_csv_atomic, write_parquet_atomic, write_text_atomic
from pipeline.errors import InputError

RECORD_KEYS = ("run_id", "tracking_uri", "split_id", "sources", "target", "model", "family", "penalty", "seed")
PREDICTIONS_ARTIFACT = "predictions/target_predictions.parquet"


def read_record(path: Path | str) -> dict:
    path = Path(path)
    try:
        record = json.loads(path.read_text())
    except (OSError, json.JSONDecodeError) as error:
        raise InputError(f"cannot read run record: {error}", file=str(path)) from None
    missing = [key for key in RECORD_KEYS if key not in record]
    if missing:
        raise InputError(f"run record lacks keys {missing}", file=str(path), field=missing[0])
    return record


def _same(recorded, logged) -> bool:
    if recorded is None or logged is None:
        return recorded is None and logged is None
    recorded, logged = float(recorded), float(logged)
    if math.isnan(recorded) or math.isnan(logged):
        return math.isnan(recorded) and math.isnan(logged)
    return math.isclose(recorded, logged, rel_tol=1e-9, abs_tol=1e-12)


def check_run(record: dict, run, record_path: str) -> None:
    """The record and its MLflow run must agree: finished, same experiment, same headline metrics."""
    run_id = record["run_id"]
    if run.info.status != "FINISHED":
        raise InputError(f"MLflow run {run_id} has status {run.info.status}, not FINISHED",
                         file=record_path, field="run_id")
    if record.get("experiment_id") not in (None, run.info.experiment_id):
        raise InputError(f"MLflow run {run_id} belongs to experiment {run.info.experiment_id}, "
                         f"the record says {record['experiment_id']}", file=record_path, field="experiment_id")
    for name, recorded in sorted((record.get("metrics") or {}).items()):
        logged = run.data.metrics.get(name)
        if not _same(recorded, logged):
            raise InputError(f"MLflow run {run_id}: metric {name} is {logged} in MLflow but {recorded} "
                             f"in the record", file=record_path, field=f"metrics.{name}")
    for key in ("split_id", "model", "penalty"):
        tag = run.data.tags.get(key)
        if tag is not None and tag != str(record[key]):
            raise InputError(f"MLflow run {run_id}: tag {key}={tag} but the record says {record[key]}",
                             file=record_path, field=key)


def fetch_run(client, record: dict, record_path: str):
    from mlflow.exceptions import MlflowException

    try:
        return client.get_run(record["run_id"])
    except MlflowException:
        raise InputError(f"MLflow run {record['run_id']} not found in {record['tracking_uri']}",
                         file=record_path, field="run_id") from None


def run_row(record: dict, run, record_path: str) -> dict:
    row = {"run_id": record["run_id"], "record": str(record_path), "experiment": record.get("experiment"),
           "split_id": record["split_id"], "sources": "+".join(record["sources"]), "target": record["target"],
           "model": record["model"], "family": record["family"], "penalty": record["penalty"],
           "seed": int(record["seed"]), "selection_rule": record.get("selection_rule"),
           "tracking_uri": record["tracking_uri"], "artifact_uri": run.info.artifact_uri, "start_time": run.info.start_time,
           # the protocol twins must share (runs logged before the tag existed drew balanced batches), and the
           # environment unit, naming a fallback (pipeline.environments)
           "sampling": run.data.tags.get("sampling", grid_stats.PROTOCOL_DEFAULTS["sampling"]),
           "environment": environments.describe({"environment": run.data.tags.get("environment", ""),
                                                 "environment_fallback_from":
                                                     run.data.tags.get("environment_fallback_from")})}
    row.update({name: float(value) for name, value in run.data.metrics.items()})
    row.update({f"tag.{name}": value for name, value in run.data.tags.items() if not name.startswith("mlflow.")})
    row.update({f"param.{name}": value for name, value in run.data.params.items()})
    return row


def collect_runs(record_paths: list[Path | str]) -> tuple[pd.DataFrame, dict]:
    """One row per current run (cross-checked against MLflow) and the skipped runs {reason: [record]}.

    The runs come from one paged search per store over the records' experiments (`current_runs`); a run
    the search does not return (a deleted run, a record without experiment_id or naming the wrong one) is
    fetched by id, so each record meets the same checks and errors as before.
    """
    records = [(str(path), read_record(path)) for path in record_paths]
    clients: dict[str, object] = {}
    found: dict[str, dict] = {}
    for path, record in records:
        uri = record["tracking_uri"]
        if uri not in clients:
            clients[uri] = tracking.open_existing_store(uri, file=path, field="tracking_uri")
    for uri, client in clients.items():
        experiments = sorted({str(r["experiment_id"]) for _, r in records
                              if r["tracking_uri"] == uri and r.get("experiment_id") is not None})
        found[uri] = current_runs(client, experiments)
    rows, skipped = [], {}
    for path, record in records:
        uri = record["tracking_uri"]
        run = found[uri].get(record["run_id"])
        if run is None:
            run = fetch_run(clients[uri], record, path)
        if tracking.SUPERSEDED_TAG in run.data.tags:
            skipped.setdefault("superseded", []).append(path)
            continue
        check_run(record, run, path)
        rows.append(run_row(record, run, path))
    if not rows:
        raise InputError(f"no current run among {len(record_paths)} run records", field="runs")
    runs = pd.DataFrame(rows).sort_values(["split_id", "model", "penalty", "seed"], ignore_index=True)
    return runs, skipped


def current_runs(client, experiment_ids: list[str]) -> dict:
    """{run_id: run} of every active run in the experiments, from MLflow's paged search (about 2.5 x faster
    per run than get_run on a SQL store). The search builds tens of objects per run; Python's cyclic
    garbage collector would walk them again and again while they pile up (half the time at 1,000 runs)
    and finds nothing to free, so it waits until the pages are read."""
    import gc

    enabled = gc.isenabled()
    gc.disable()
    try:
        return {run.info.run_id: run for run in tracking.search_all_runs(client, experiment_ids)}
    finally:
        if enabled:
            gc.enable()


def predictions_of(run_id: str, artifact_uri: str, tracking_uri: str, record_path: str,
                   project_artifacts: Path | None = None) -> pa.Table:
    """A run's predictions table (the columns window_stats reads): read in place for a local artifact store,
    downloaded otherwise."""
    parsed = urlparse(artifact_uri)
    if parsed.scheme in ("", "file"):
        path = tracking.local_artifacts(artifact_uri, project_artifacts) / PREDICTIONS_ARTIFACT
        if not path.exists():
            raise InputError(f"MLflow run {run_id} has no artifact {PREDICTIONS_ARTIFACT} ({path})",
                             file=record_path, field="artifacts")
        return _read_predictions(path, record_path)
    from mlflow.exceptions import MlflowException

    with tempfile.TemporaryDirectory() as folder:
        try:
            local = tracking.client_for(tracking_uri).download_artifacts(run_id, PREDICTIONS_ARTIFACT, folder)
        except (MlflowException, OSError):
            raise InputError(f"MLflow run {run_id} has no artifact {PREDICTIONS_ARTIFACT}",
                             file=record_path, field="artifacts") from None
        return _read_predictions(Path(local), record_path)


def _read_predictions(path: Path, record_path: str) -> pa.Table:
    import pyarrow.parquet as pq

    try:
        file = pq.ParquetFile(path)
        return file.read(columns=[name for name in file.schema_arrow.names if window_stats.wanted(name)],
                         use_threads=False)  # the reader's threads are per file (window_tables)
    except (OSError, pa.ArrowException) as error:
        raise InputError(f"cannot read predictions artifact {path}: {error}", file=record_path,
                         field="artifacts") from None


READER_THREADS = 4  # pyarrow reads without the GIL: a few threads overlap file IO and decoding


def window_tables(runs: pd.DataFrame, rules: list[str], load=predictions_of) -> dict[str, dict]:
    """Per run: {"errors": {rule: window_stats.Windows}, "horizon": hours, "stride": hours}, each artifact read
    once (READER_THREADS at a time).

    Horizon and stride must be in the same unit (the HAC lags and the bootstrap blocks use their ratio): the
    artifact counts the horizon in steps of the study's cadence, so it is taken from the logged
    `forecast.horizon_hours`; runs logged without it are hourly, where steps and hours agree.
    """
    from concurrent.futures import ThreadPoolExecutor

    def table(row) -> dict:
        frame = load(row.run_id, row.artifact_uri, row.tracking_uri, row.record)
        errors = window_stats.windows_by_rule(frame, rules)
        horizon = _logged(runs, row.Index, "param.forecast.horizon_hours")
        return {"errors": errors,
                "horizon": int(float(horizon)) if horizon is not None else window_stats.horizon_of(frame),
                "stride": window_stats.stride_hours(window_stats.origins_of(frame),
                                                    _logged(runs, row.Index, "param.forecast.stride_hours"))}

    rows = list(runs.itertuples())
    with ThreadPoolExecutor(READER_THREADS) as pool:
        return dict(zip((row.run_id for row in rows), pool.map(table, rows)))


def _logged(runs: pd.DataFrame, index, column: str):
    """A run's logged value of `column`, or None when the column or the value is missing."""
    if column not in runs.columns or pd.isna(runs.at[index, column]):
        return None
    return runs.at[index, column]


def _members(runs: pd.DataFrame, keys: list[str]) -> dict[tuple, list[tuple]]:
    """{key values: [(penalty, seed, run_id), ...]} in the run table's order, keys sorted as groupby sorts them:
    plain lists, because thousands of small pandas groups cost more than the statistics."""
    columns = [runs[key].tolist() if key in runs else [grid_stats.PROTOCOL_DEFAULTS[key]] * len(runs)
               for key in keys]
    groups: dict[tuple, list[tuple]] = {}
    for key, member in zip(zip(*columns), zip(runs["penalty"].tolist(), runs["seed"].tolist(),
                                              runs["run_id"].tolist())):
        groups.setdefault(key, []).append(member)
    return {key: groups[key] for key in sorted(groups)}


def dm_tests(runs: pd.DataFrame, rules: list[str], tables: dict[str, dict]) -> pd.DataFrame:
    """Diebold-Mariano + HLN of every penalty against its ERM twin (same split, model and sampling), per rule and
    loss, with Holm-adjusted p-values over each rule's family of comparisons (all computed together:
    window_stats.paired_dm_many)."""
    keys, comparisons = [], []
    for (split_id, model, _), members in _members(runs, ["split_id", "model", "sampling"]).items():
        erm = [run_id for penalty, _, run_id in members if penalty == names.ERM]
        penalties = sorted({penalty for penalty, _, _ in members} - {names.ERM, names.NOT_APPLICABLE})
        if not erm or not penalties:
            continue
        horizon, stride = tables[erm[0]]["horizon"], tables[erm[0]]["stride"]
        for penalty in penalties:
            penalised = [run_id for shown, _, run_id in members if shown == penalty]
            for rule in rules:
                keys.append((split_id, model, penalty, rule))
                comparisons.append(([tables[r]["errors"][rule] for r in penalised],
                                    [tables[r]["errors"][rule] for r in erm], horizon, stride))
    rows = [(*key, *by_loss[loss].values()) for key, by_loss in zip(keys, window_stats.paired_dm_many(comparisons))
            for loss in window_stats.LOSSES]
    dm = pd.DataFrame(rows, columns=["split_id", "model", "penalty", "selection_rule", *window_stats.DM_COLUMNS])
    dm["dm_p_holm"] = window_stats.holm_by_family(dm)
    return dm


def cell_intervals(runs: pd.DataFrame, rules: list[str], tables: dict[str, dict], n_boot: int) -> pd.DataFrame:
    """The origin block-bootstrap interval of every cell, rule and resamplable metric (all cells together:
    window_stats.cell_intervals_many)."""
    keys, cells = [], []
    for key, members in _members(runs, ["split_id", "model", "penalty"]).items():
        run_ids = [run_id for _, _, run_id in sorted(members, key=lambda member: member[1])]  # by seed
        horizon, stride = tables[run_ids[0]]["horizon"], tables[run_ids[0]]["stride"]
        for rule in rules:
            keys.append((*key, rule))
            cells.append(([tables[r]["errors"][rule] for r in run_ids], horizon, stride))
    rows = [(*key, metric, *result.values()) for key, results in
            zip(keys, window_stats.cell_intervals_many(cells, n_boot)) for metric, result in results.items()]
    return pd.DataFrame(rows, columns=["split_id", "model", "penalty", "selection_rule", "metric",
                                       *window_stats.INTERVAL_COLUMNS])


def build_grid(runs: pd.DataFrame, dm: pd.DataFrame, intervals: pd.DataFrame, metric: str) -> tuple[pd.DataFrame, dict]:
    """The summary table (every available rule) and the Friedman/Iman-Davenport/Nemenyi result per rule."""
    summaries, friedman = [], {}
    for rule in grid_stats.available_rules(runs):
        summary = grid_stats.attach_tests(grid_stats.summarise(runs, metric, rule), dm, intervals)
        friedman[rule] = grid_stats.friedman_over_targets(summary)
        summaries.append(summary)
    return pd.concat(summaries, ignore_index=True), friedman


def aggregate(record_paths: list[Path | str], out_dir: Path | str, metric: str = "mae",
              n_boot: int = 2000, load=None) -> dict:
    """Whole aggregation step; returns the meta dict also written to grid_meta.json. `load` reads a run's
    predictions (default: predictions_of, with this project's mlartifacts/ under `out_dir`)."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    load = load or functools.partial(predictions_of, project_artifacts=out_dir.resolve() / "mlartifacts")
    runs, skipped = collect_runs(record_paths)
    rules = grid_stats.available_rules(runs)
    parts, by_target = {"dm": [], "intervals": [], "summary": [], "trials": []}, {}
    for variable, section in target_sections.run_sections(runs):  # one grid per forecast variable
        tables = window_tables(section, rules, load)
        dm = dm_tests(section, rules, tables)
        intervals = cell_intervals(section, rules, tables, n_boot)
        summary, friedman = build_grid(section, dm, intervals, metric)
        trials = trial_table.collect(section, metric, rules, read_record)
        for name, table in (("dm", dm), ("intervals", intervals), ("summary", summary), ("trials", trials)):
            parts[name].append(target_sections.labelled(table, variable))
        by_target[variable] = {"metric_label": summary["metric_label"].iloc[0], "friedman": friedman}
    dm, intervals, summary, trials = (pd.concat(parts[name], ignore_index=True)
                                      for name in ("dm", "intervals", "summary", "trials"))
    write_parquet_atomic(runs, out_dir / "grid.parquet")
    write_csv_atomic(trials, out_dir / "grid_trials.csv")
    write_csv_atomic(summary, out_dir / "grid.csv")
    write_csv_atomic(dm, out_dir / "grid_dm.csv")
    write_csv_atomic(intervals, out_dir / "grid_intervals.csv")
    several = None not in by_target
    meta = {"metric": metric, "rules": rules,
            # one forecast variable: its label and Friedman test; several: each under "targets", by variable
            "metric_label": "; ".join(entry["metric_label"] for entry in by_target.values()),
            "friedman": {} if several else by_target[None]["friedman"],
            **({"targets": by_target} if several else {}),
            "n_records": len(record_paths), "n_runs": int(len(runs)),
            "experiment": sorted(runs["experiment"].dropna().unique().tolist()),
            "tracking_uris": sorted(runs["tracking_uri"].unique().tolist()),
            "skipped": {reason: {"count": len(paths), "records": paths} for reason, paths in skipped.items()},
            "n_trials": int(len(trials)), "bootstrap_samples": n_boot, "alpha": grid_stats.ALPHA,
            "tie_tolerance": stats.TIE_TOLERANCE}
    write_text_atomic(json.dumps(meta, indent=1, sort_keys=True, default=_json_default), out_dir / "grid_meta.json")
    return meta


def _json_default(value):
    if isinstance(value, (np.floating, np.integer)):
        return value.item()
    raise TypeError(f"cannot serialise {type(value).__name__}")
