"""The trials behind the grid: one row per hyperparameter-search trial of every searched run in the grid.

Called by pipeline.aggregate with the grid's run table (one row per current run record). Reads each run
record again for its "search" entry (pipeline.search_job) and each trial's MLflow run; returns the table
that pipeline.aggregate writes to results/grid_trials.csv (no file is written here). Config keys obeyed
(handed over): report.metric.

Columns: the run's identity (split_id, sources, target, model, family, penalty, seed, sampling), its parent
run (`parent_run_id`), the trial (`trial`, `run_id`), `selected_by` (the rules that chose it, ";"-joined),
one `search.<key>` column per searched key, and per logged rule `<rule>.selection_score` and the metric
(`<rule>.<metric column>`, e.g. source-holdout.target_mae). The target columns are target test errors: a
view of them across trials (the report's penalty-weight sensitivity) uses target data and is labelled so.
"""

from __future__ import annotations

import pandas as pd

from pipeline import grid_stats, selection, tracking
from pipeline.errors import InputError

IDENTITY = ("split_id", "sources", "target", "model", "family", "penalty", "seed", "sampling")
COLUMNS = (*IDENTITY, "parent_run_id", "trial", "run_id", "selected_by")
VALUE_PREFIX = "search."


def _trial_run(client, run_id: str, record_path: str):
    from mlflow.exceptions import MlflowException

    try:
        run = client.get_run(run_id)
    except MlflowException:
        raise InputError(f"search trial {run_id} not found", file=record_path, field="search.trials") from None
    if run.info.status != "FINISHED":
        raise InputError(f"search trial {run_id} has status {run.info.status}, not FINISHED", file=record_path,
                         field="search.trials")
    return run


def collect(runs: pd.DataFrame, metric: str, rules: list[str], read_record) -> pd.DataFrame:
    """Every trial of the searched runs in `runs` (rows of pipeline.aggregate.collect_runs); `read_record`
    reads a run record (pipeline.aggregate.read_record)."""
    columns = {rule: grid_stats.metric_column(runs.columns, metric, rule) for rule in rules}
    clients, rows = {}, []
    for run in runs.itertuples(index=False):
        info = read_record(run.record).get("search")
        if not info:
            continue
        client = clients.setdefault(run.tracking_uri, tracking.client_for(run.tracking_uri))
        for trial in info["trials"]:
            logged = _trial_run(client, trial["run_id"], run.record).data.metrics
            row = {key: getattr(run, key) for key in IDENTITY}
            chosen_by = [rule for rule in rules if info["selected"].get(rule) == trial["trial"]]
            row.update({"parent_run_id": run.run_id, "trial": int(trial["trial"]), "run_id": trial["run_id"],
                        "selected_by": ";".join(chosen_by)})
            row.update({f"{VALUE_PREFIX}{key}": value for key, value in trial["values"].items()})
            for rule in rules:
                row[f"{rule}.{selection.SCORE}"] = logged.get(f"{rule}.{selection.SCORE}")
                row[columns[rule]] = logged.get(columns[rule])
            rows.append(row)
    return pd.DataFrame(rows, columns=list(COLUMNS) if not rows else None)


def searched_keys(trials: pd.DataFrame) -> list[str]:
    """The searched keys present in a trial table (without the column prefix)."""
    return [column[len(VALUE_PREFIX):] for column in trials.columns if column.startswith(VALUE_PREFIX)]
