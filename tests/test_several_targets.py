"""Several forecast targets as a sweep axis (`target=pm25,no2`): the plan, run identity and superseding.

A single target keeps today's plan byte for byte (paths, job params), so existing runs stay current; with
several, each target's runs have their own paths, jobs, job slices (so digests) and MLflow tag.
"""

import json

import pytest

from project_copy import REPO

from pipeline import tracking
from pipeline.config import compose_config, expand_sweep_overrides, validate
from pipeline.errors import InputError
from pipeline.workflow import compose_plan, unit_target


@pytest.fixture(scope="module")
def plans():
    return {name: compose_plan(overrides, REPO) for name, overrides in
            {"default": ["experiment=tiny"], "one": ["experiment=tiny", "target=pm25"],
             "two": ["experiment=tiny", "target=pm25,no2"]}.items()}


def test_target_sweep_syntax():
    assert expand_sweep_overrides(["target=pm25,no2", "model=lstm"]) == [
        "sweep.targets=[pm25,no2]", "forecast.target=pm25", "sweep.models=[lstm]", "model=lstm"]


def test_one_target_keeps_todays_plan(plans):
    default, one = plans["default"], plans["one"]
    assert not one.several_targets and one.targets == ["pm25"]
    assert one.all_run_records() == default.all_run_records()
    assert {k: j.params_json for k, j in one.jobs.items()} == {k: j.params_json for k, j in default.jobs.items()}
    assert all(path.startswith("results/runs/loco-") for path in one.all_run_records())


def test_two_targets_double_the_runs_each_under_its_variable(plans):
    one, two = plans["one"], plans["two"]
    records = two.all_run_records()
    assert len(records) == 2 * len(one.all_run_records()) == len(set(records))
    for variable in ("pm25", "no2"):
        mine = [p for p in records if p.startswith(f"results/runs/{variable}/")]
        assert [p.replace(f"runs/{variable}/", "runs/") for p in mine] == one.all_run_records()
    # a training job per split x model x variable: its windows are built for one variable
    trainable = [job for key, job in two.jobs.items() if key[1] != "baselines"]
    assert {job.target for job in trainable} == {"pm25", "no2"}
    assert all(unit_target(unit) == job.target for job in trainable for unit in job.units)
    assert two.job(trainable[0].split_id, trainable[0].model, trainable[0].target) is trainable[0]
    # the variable is part of each job slice (so of the unit digest), and only it differs
    pm25, no2 = (two.job(trainable[0].split_id, "linear", v).units[0]["job"] for v in ("pm25", "no2"))
    assert pm25 != no2 and {**no2, "forecast": {**no2["forecast"], "target": "pm25"}} == pm25
    # a split's baselines job fits every closed-form family of it for each variable, one job per split
    baselines = [job for key, job in two.jobs.items() if key[1] == "baselines"]
    assert sorted(job.split_id for job in baselines) == sorted(two.splits)
    for job in baselines:
        assert sorted({unit_target(u) for u in job.units}) == ["no2", "pm25"]
        assert {u["split_id"] for u in job.units} == {job.split_id}
        assert two.records_of(job) == [p.replace("{split_id}", job.split_id) for p in two.baseline_record_patterns()]


def test_plan_survives_the_cache_round_trip(plans):
    from pipeline.workflow import WorkflowPlan

    two = plans["two"]
    again = WorkflowPlan.from_data(json.loads(json.dumps(two.to_data())), two.root)
    assert again.targets == two.targets and again.all_run_records() == two.all_run_records()
    assert set(again.jobs) == set(two.jobs)


@pytest.mark.parametrize("overrides, message", [(["target=pm25,pm25"], "listed twice"),
                                                (["target=pm25,soot"], "unknown forecast target"),
                                                (["sweep.targets=[NO2]"], "sweep.targets")])
def test_bad_target_lists_fail_before_any_job(overrides, message):
    with pytest.raises(InputError, match=message):
        validate(compose_config(expand_sweep_overrides(overrides), REPO))


def test_runs_of_another_forecast_variable_are_not_superseded(tmp_path):
    uri = tracking.resolve_tracking_uri(None, tmp_path)
    experiment_id = tracking.setup_store(uri, "targets", tracking.artifact_location(tmp_path))
    client = tracking.client_for(uri)
    identity = {"split_id": "s", "model": "lin", "penalty": "erm", "seed": "0"}

    def log(tags):
        return tracking.log_run(client, experiment_id, run_name="r", params={}, metrics={}, curves={},
                                tags={**identity, **tags}, artifacts={})

    legacy = log({})  # logged before the tag existed: counts as the same variable
    pm25 = log({tracking.FORECAST_TARGET_TAG: "pm25"})
    assert tracking.supersede_previous(client, experiment_id, identity, pm25) == [legacy]
    no2 = log({tracking.FORECAST_TARGET_TAG: "no2"})
    assert tracking.supersede_previous(client, experiment_id, identity, no2) == []
    pm25_again = log({tracking.FORECAST_TARGET_TAG: "pm25"})
    assert tracking.supersede_previous(client, experiment_id, identity, pm25_again) == [pm25]
