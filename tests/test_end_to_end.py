"""One tiny run of the real DAG: demo dumps (12 days, 3 cities) -> ingest -> splits -> train -> grid/report,
with a hyperparameter search of 2 trials per run (ERM: two learning rates; IRMv1: two penalty weights;
ridge: two alphas) added to the `tiny` experiment.

Runs Snakemake in a temporary project folder holding a copy of config/, so nothing under the repository's
data/ or results/ is touched. Marked e2e: `make test` runs it; `make test-fast` skips it.
"""

import json
from pathlib import Path

import pytest

from project_copy import make_project, shiftgrid

# The shipped tiny experiment plus a search, as an experiment file of the project copy (a space is a dict,
# which is best declared in a file: on the command line it needs shell quoting)
SEARCH = """
search:
  budget: 2
  model:
    ridge: {model.alpha: {choices: [0.1, 10.0]}}
  penalty:
    erm: {fit.lr: {choices: [0.001, 0.003]}}
    irm: {penalty.weight: {choices: [1.0, 10.0]}}
"""
OVERRIDES = ["experiment=tiny_search"]


@pytest.fixture(scope="module")
def project(tmp_path_factory) -> Path:
    folder = make_project(tmp_path_factory.mktemp("project"))
    experiments = folder / "config" / "experiment"
    (experiments / "tiny_search.yaml").write_text((experiments / "tiny.yaml").read_text() + SEARCH)
    return folder


@pytest.fixture(scope="module")
def finished(project) -> Path:
    written = shiftgrid(project, "demo", *OVERRIDES)
    assert written.returncode == 0, written.stderr[-3000:]
    ran = shiftgrid(project, "run", *OVERRIDES)
    assert ran.returncode == 0, (ran.stdout[-3000:], ran.stderr[-3000:])
    return project


@pytest.mark.e2e
def test_every_planned_run_has_a_record_with_a_finished_mlflow_run(finished):
    from pipeline.tracking import client_for
    from pipeline.workflow import plan_workflow

    plan = plan_workflow(OVERRIDES, finished)
    records = plan.all_run_records()
    # 3 loco splits x (persistence + ridge: 1 run each; linear + lstm: 2 penalties x 1 seed); the searched
    # ones are parents of 2 trials each
    assert len(records) == 3 * (2 + 2 * 2)
    client = client_for(plan.tracking_uri)
    for path in records:
        record = json.loads((finished / path).read_text())
        run = client.get_run(record["run_id"])
        assert run.info.status == "FINISHED"
        assert run.data.tags["split_id"] == record["split_id"]
        assert run.data.metrics["target_mae"] == pytest.approx(record["metrics"]["target_mae"])
        assert record["metrics"]["target_mae"] > 0


@pytest.mark.e2e
def test_grid_and_report_exist_and_carry_the_caution(finished):
    grid = (finished / "results" / "grid.csv").read_text()
    assert "lstm" in grid and "irm" in grid
    report = (finished / "results" / "report.html").read_text()
    assert "not an air-quality advisory" in report or "not air-quality advisories" in report


@pytest.mark.e2e
def test_a_second_run_does_nothing(finished):
    from pipeline.runner import dry_run

    result = dry_run(OVERRIDES, root=finished)
    assert result.returncode == 0, result.stderr[-2000:]
    assert "Nothing to be done" in result.stdout + result.stderr


@pytest.mark.e2e
def test_searched_runs_are_parents_of_their_trials_and_the_report_shows_the_weights(finished):
    import pandas as pd

    from pipeline.tracking import PARENT_TAG, ROLE_TAG, client_for
    from pipeline.workflow import plan_workflow

    plan = plan_workflow(OVERRIDES, finished)
    client = client_for(plan.tracking_uri)
    weights = set()
    for path in plan.all_run_records():
        record = json.loads((finished / path).read_text())
        if record["model"] == "persistence":
            assert "search" not in record  # nothing to search: trained once, no parent
            continue
        parent = client.get_run(record["run_id"])
        assert parent.data.tags[ROLE_TAG] == "parent"
        trials = [client.get_run(trial["run_id"]) for trial in record["search"]["trials"]]
        assert len(trials) == 2 and all(t.info.status == "FINISHED" for t in trials)
        assert {t.data.tags[PARENT_TAG] for t in trials} == {record["run_id"]}
        if record["penalty"] == "irm":
            weights |= {t.data.params["penalty.weight"] for t in trials}
    assert weights == {"1.0", "10.0"}
    trials = pd.read_csv(finished / "results" / "grid_trials.csv")
    assert len(trials) == 3 * (1 + 2 * 2) * 2  # ridge and the 4 model x penalty runs of each split, 2 trials each
    report = (finished / "results" / "report.html").read_text()
    assert 'id="search"' in report and "Penalty-weight sensitivity" in report
