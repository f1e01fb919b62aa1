"""One tiny run of the real DAG: demo dumps (12 days, 3 cities) -> ingest -> splits -> train -> grid/report.

Runs Snakemake in a temporary project folder holding a copy of config/, so nothing under the repository's
data/ or results/ is touched. Marked e2e: `make test` runs it; `make test-fast` skips it.
"""

import json
from pathlib import Path

import pytest

from project_copy import make_project, shiftgrid

OVERRIDES = ["experiment=tiny"]


@pytest.fixture(scope="module")
def project(tmp_path_factory) -> Path:
    return make_project(tmp_path_factory.mktemp("project"))


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
    # 3 loco splits x (persistence + ridge: 1 run each; linear + lstm: 2 penalties x 1 seed)
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
