"""Every shipped experiment file passes a real Snakemake dry run (DAG built, nothing executed).

Raw dumps are written first with `shiftgrid demo --days 2` into a temporary project folder (a dry run
only needs the files to exist), then `snakemake -n` is run once per experiment.
"""

from pathlib import Path

import pytest

from project_copy import REPO, make_project, shiftgrid

from pipeline.runner import dry_run
from pipeline.workflow import plan_workflow

EXPERIMENTS = sorted(p.stem for p in (REPO / "config" / "experiment").glob("*.yaml"))


@pytest.fixture(scope="module")
def project(tmp_path_factory) -> Path:
    folder = make_project(tmp_path_factory.mktemp("dry"))
    written = set()
    for experiment in EXPERIMENTS:
        raw_dir = plan_workflow([f"experiment={experiment}"], folder).cfg.data.raw_dir
        if raw_dir in written and experiment != "airports":
            continue
        result = shiftgrid(folder, "demo", "--days", "2", f"experiment={experiment}", timeout=300)
        assert result.returncode == 0, result.stderr[-2000:]
        written.add(raw_dir)
    return folder


@pytest.mark.e2e
@pytest.mark.parametrize("experiment", EXPERIMENTS)
def test_experiment_dry_run_schedules_every_planned_run(project, experiment):
    plan = plan_workflow([f"experiment={experiment}"], project)
    result = dry_run([f"experiment={experiment}"], root=project)
    assert result.returncode == 0, (result.stdout[-2000:], result.stderr[-2000:])
    text = result.stdout + result.stderr
    for rule in ("ingest_city", "build_split", "aggregate_grid", "render_report"):
        assert rule in text
    assert len(plan.all_run_records()) > 0


@pytest.mark.e2e
def test_two_forecast_targets_schedule_a_job_per_variable(project):
    """`target=pm25,no2` on the tiny experiment: the train rule's {variable} wildcard resolves every
    planned record of both variables (a dry run: no DAG is executed)."""
    overrides = ["experiment=tiny", "target=pm25,no2"]
    plan = plan_workflow(overrides, project)
    result = dry_run(overrides, root=project)
    assert result.returncode == 0, (result.stdout[-2000:], result.stderr[-2000:])
    text = result.stdout + result.stderr
    for variable in ("pm25", "no2"):
        assert f"runs/{variable}/" in text and f"logs/train_model/{variable}/" in text
    trained = [job for key, job in plan.jobs.items() if key[1] != "baselines"]
    assert len(trained) == 2 * len(plan.splits) * len(plan.trainable_models)


@pytest.mark.e2e
def test_each_split_has_its_own_baselines_job_reading_only_its_cities(project):
    """New data for one city must not re-fit the baselines of splits without it: a split's baselines job
    reads its split record, the tracking record and the clean tables of its own cities, nothing else."""
    from pipeline.outdated import parse_dry_run

    overrides = ["experiment=demo"]  # some of its splits leave a city out
    plan = plan_workflow(overrides, project)
    assert any(len(plan.split_cities(split_id)) < len(plan.cities) for split_id in plan.splits)
    result = dry_run(overrides, root=project)
    assert result.returncode == 0, (result.stdout[-2000:], result.stderr[-2000:])
    jobs = [job for job in parse_dry_run(result.stdout + "\n" + result.stderr) if job.rule == "fit_baselines"]
    assert sorted(job.wildcards["split_id"] for job in jobs) == sorted(plan.splits)
    for job in jobs:
        split_id = job.wildcards["split_id"]
        assert set(job.input) == {f"{plan.results_dir}/splits/{split_id}.json", f"{plan.results_dir}/tracking.json",
                                  *(plan.clean_path(city) for city in plan.split_cities(split_id))}
        assert job.output == plan.records_of(plan.baselines_job(split_id))
