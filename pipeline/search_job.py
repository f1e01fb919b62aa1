"""The search side of a training job: a run's trials become MLflow child runs of one parent run, which
holds, per selection rule, the results of the trial that rule selects.

Called by pipeline.train_job. Reads planned units (a unit with "search": {"budget", "trials"} from
pipeline.search.attach) and the trials' MLflow runs (metrics, params, tags, artifacts); writes the parent
run (tags, params, metrics, artifacts) and the trials' `mlflow.parentRunId` tag. Config keys obeyed
through the job slice: selection.rule and selection.also (which rules select a trial).

Why a parent: the grid, the statistics and the run records read one run per split x model x penalty x
seed; the parent is that run. Under each rule r its `r.*` metrics and its predictions come from the trial
r selects (by `r.selection_score`, pipeline.selection.choose_trial), so an honest rule never selects with
target data and target-peek stays an upper bound in the trial as well; its un-prefixed metrics, params,
config, weights and curve are those of the trial the headline rule (selection.rule) selects. Each trial is
a run of its own identity (its searched values, pipeline.tracking.TRIAL_TAG), reused by its unit digest,
so a larger budget trains only the new trials; the parent is reused when all its trials are.
"""

from __future__ import annotations

import hashlib
import json
import tempfile
from pathlib import Path

import pandas as pd

from pipeline import search, selection, tracking
from pipeline.canonical import canonical_json

PREDICTIONS = "predictions/target_predictions.parquet"  # the artifact pipeline.aggregate reads


def expand(units: list[dict], record_paths: list) -> list[tuple[int, dict, object]]:
    """(unit index, unit to produce, its record path) in order: a searched unit gives one unit per trial,
    whose record path is None (its parent's record is written once every trial is there)."""
    work = []
    for index, (unit, path) in enumerate(zip(units, record_paths)):
        if unit.get("search"):
            work += [(index, {"job": search.apply(unit["job"], values), "seed": unit["seed"]}, None)
                     for values in unit["search"]["trials"]]
        else:
            work.append((index, unit, path))
    return work


def rules_of(metrics: dict) -> list[str]:
    """The selection rules a run logged metrics under, in the canonical order."""
    return [rule for rule in selection.RULES if f"{rule}.{selection.SCORE}" in metrics]


def choose(rules: list[str], trial_metrics: list[dict]) -> dict[str, int]:
    """The trial each rule selects (index into the trials)."""
    return {rule: selection.choose_trial(rule, trial_metrics) for rule in rules}


def parent_metrics(rules: list[str], primary: str, chosen: dict[str, int], trial_metrics: list[dict]) -> dict:
    """`r.*` from the trial rule r selects; un-prefixed scalars (headline metrics, timings) from the headline
    rule's trial. Curves (`curve.*`) stay with the trials."""
    metrics = {}
    for rule in rules:
        metrics.update({k: v for k, v in trial_metrics[chosen[rule]].items() if k.startswith(f"{rule}.")})
    metrics.update({k: v for k, v in trial_metrics[chosen[primary]].items()
                    if k.split(".", 1)[0] not in selection.RULES and not k.startswith("curve.")})
    return metrics


def parent_digest(trial_digests: list[str]) -> str:
    """The parent's unit digest: its trials' (each covers config, seed, code and data), in trial order."""
    return hashlib.sha256(canonical_json({"search_parent_of": trial_digests}).encode()).hexdigest()[:20]


def _artifacts(client, workdir: Path, primary_trial: str, chosen_runs: dict[str, str], table: list[dict]) -> dict:
    """The headline trial's artifacts, its predictions replaced by each rule's selected trial's rows for that
    rule, plus search/trials.json (every trial, its values, scores and which rules chose it)."""
    tree = Path(client.download_artifacts(primary_trial, "", str(workdir / "primary")))
    frames = []
    for rule, run_id in chosen_runs.items():
        local = Path(client.download_artifacts(run_id, PREDICTIONS, str(workdir / f"rule-{rule}")))
        frame = pd.read_parquet(local)
        frames.append(frame[frame["selection"] == rule])
    pd.concat(frames, ignore_index=True).to_parquet(tree / PREDICTIONS, index=False)
    (workdir / "search").mkdir()
    (workdir / "search" / "trials.json").write_text(json.dumps(table, indent=1, default=float))
    files = {str(p.parent.relative_to(tree)): p for p in sorted(tree.rglob("*")) if p.is_file()}
    return {**files, "search": workdir / "search" / "trials.json"}


def finish_cell(client, experiment_id: str, unit: dict, trial_records: list[dict], base_tags: dict[str, str],
                supersede: bool = True, reuse: bool = True) -> dict:
    """Select each rule's trial and log (or reuse) the parent run of one searched unit; point the trials at
    it. Returns {"run_id", "primary", "metrics", "superseded", "reused", "search"} for the run record."""
    runs = [client.get_run(record["run_id"]) for record in trial_records]
    trial_metrics = [dict(run.data.metrics) for run in runs]
    rules = rules_of(trial_metrics[0])
    primary = unit["job"]["selection"]["rule"]
    primary = primary if primary in rules else rules[0]
    chosen = choose(rules, trial_metrics)
    trials = unit["search"]["trials"]
    table = [{"trial": index, "run_id": run.info.run_id, "values": values, "reused": bool(record["reused"]),
              "selected_by": [rule for rule in rules if chosen[rule] == index],
              **{f"{rule}.{selection.SCORE}": metrics.get(f"{rule}.{selection.SCORE}") for rule in rules}}
             for index, (run, values, record, metrics) in enumerate(zip(runs, trials, trial_records, trial_metrics))]
    info = {"budget": unit["search"]["budget"], "trials": table, "selected": chosen}
    digest = parent_digest([run.data.tags.get("unit_digest", "") for run in runs])
    found = None
    if reuse and all(record["reused"] for record in trial_records):
        found = tracking.find_current_run(client, experiment_id, digest)
    if found is not None:
        parent_id, metrics, superseded = found.info.run_id, dict(found.data.metrics), []
    else:
        head = runs[chosen[primary]]
        metrics = parent_metrics(rules, primary, chosen, trial_metrics)
        tags = {**base_tags, "unit_digest": digest, tracking.ROLE_TAG: "parent",
                "search.budget": str(info["budget"]), "search.trials": str(len(runs)),
                "search.selected_values": canonical_json(trials[chosen[primary]]),
                "selection_label": selection.label(primary),
                **{f"search.selected.{rule}": runs[chosen[rule]].info.run_id for rule in rules}}
        with tempfile.TemporaryDirectory() as workdir:
            artifacts = _artifacts(client, Path(workdir), head.info.run_id,
                                   {rule: runs[chosen[rule]].info.run_id for rule in rules}, table)
            parent_id = tracking.log_run(client, experiment_id, run_name=f"{head.info.run_name} (search)",
                                         params=dict(head.data.params), metrics=metrics, curves={}, tags=tags,
                                         artifacts=artifacts)
        identity = {key: base_tags[key] for key in tracking.RUN_IDENTITY_TAGS}
        superseded = tracking.supersede_previous(client, experiment_id, identity, parent_id) if supersede else []
    for run in runs:
        if run.data.tags.get(tracking.PARENT_TAG) != parent_id:
            client.set_tag(run.info.run_id, tracking.PARENT_TAG, parent_id)
    return {"run_id": parent_id, "primary": primary, "metrics": metrics, "superseded": superseded,
            "reused": found is not None, "search": info}
