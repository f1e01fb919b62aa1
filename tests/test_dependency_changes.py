"""A changed library version: reported by `status` by default, a re-run reason with dependency_changes=rerun.

Unit level: synthetic version records beside job logs, synthetic Snakemake metadata; the e2e re-run cases
are in test_reruns.py.
"""

import base64
import json
from pathlib import Path

from pipeline import outdated, provenance
from pipeline.canonical import ConfigNode
from pipeline.outdated import PlannedJob
from pipeline.workflow import TrainJob, WorkflowPlan


def test_rule_dependencies_follow_the_import_graph():
    training = provenance.rule_dependencies("train_model", ["lstm"])
    assert {"python", "torch", "numpy", "pandas", "pyarrow", "mlflow"} <= set(training)
    assert "torch" not in provenance.rule_dependencies("ingest_city")
    assert "scikit-learn" in provenance.rule_dependencies("fit_baselines", ["persistence", "ridge"])
    assert "matplotlib" not in training
    assert "matplotlib" in provenance.rule_dependencies("render_report")
    assert set(provenance.rule_dependencies("render_report")) <= set(provenance.result_versions())


def test_versions_are_params_only_when_the_setting_says_rerun():
    def plan(mode):
        return WorkflowPlan(cfg=ConfigNode({"tracking": {"dependency_changes": mode}}), overrides=[],
                            root=Path("."), cities=[], splits={})

    assert plan("report").versions("train_model", ["lstm"]) == ""
    rerun = json.loads(plan("rerun").versions("train_model", ["lstm"]))
    assert rerun == provenance.rule_dependencies("train_model", ["lstm"]) and "torch" in rerun


def write_record(results: Path, log: str, rule: str, versions: dict) -> None:
    path = provenance.versions_file(results / "logs" / log)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps({"rule": rule, "versions": versions}))


def test_report_mode_notes_only_libraries_the_rule_imports(tmp_path):
    now = provenance.result_versions()
    results = tmp_path / "results"
    older_torch = {**now, "torch": "0.0.1"}
    write_record(results, "train_model/s1/lstm.log", "train_model", older_torch)
    write_record(results, "train_model/s2/lstm.log", "train_model", older_torch)
    write_record(results, "ingest_city/a.log", "ingest_city", older_torch)  # ingestion does not import torch
    write_record(results, "render_report.log", "render_report", now)
    notes = outdated.recorded_version_notes(results)
    assert notes == [f"torch 0.0.1 -> {now['torch']}: 2 jobs ran with the older version (train_model 2)"]
    assert outdated.recorded_version_notes(tmp_path / "nothing") == []
    text = outdated.format_status([], [], notes)
    assert text.startswith("up to date: nothing to run") and "tracking.dependency_changes=report" in text


def test_rerun_mode_names_the_changed_versions_as_the_reason(tmp_path):
    output = "results/runs/s1/lstm/erm/0.json"
    now = {"python": "3.11.7", "torch": "2.13.0"}
    old_params = [repr("[]"), repr("abc"), repr(json.dumps({"python": "3.11.7", "torch": "2.12.0"}))]
    meta = tmp_path / ".snakemake" / "metadata" / base64.urlsafe_b64encode(output.encode()).decode()
    meta.parent.mkdir(parents=True)
    meta.write_text(json.dumps({"params": old_params}))
    job = TrainJob("s1", "lstm", [{"split_id": "s1", "model": "lstm", "penalty": "erm", "seed": 0,
                                   "job": {"model": {"family": "lstm"}, "model_name": "lstm", "penalty_name": "erm"}}],
                   code_digest="abc", versions=json.dumps(now, sort_keys=True, separators=(",", ":")))
    plan = WorkflowPlan(cfg=ConfigNode({"tracking": {"dependency_changes": "rerun"},
                                              "data": {"clean_dir": "data/clean"}}),
                        overrides=[], root=tmp_path, cities=["a", "b"],
                        splits={"s1": {"sources": ["a"], "target": "b"}}, jobs={("s1", "lstm"): job})
    planned = PlannedJob("train_model", output=[output], reason="Params have changed since last execution",
                         wildcards={"split_id": "s1", "model": "lstm"})
    reasons = outdated.explain([planned], plan, tmp_path)
    assert "library versions changed (torch 2.12.0 -> 2.13.0): 1 training jobs" in reasons
    assert outdated.version_changes(None, {"torch": "2.13.0"}) == "torch unrecorded -> 2.13.0"
