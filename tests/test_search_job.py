"""A searched run through the training job on tiny synthetic tables: trials as MLflow child runs of one
parent, selection by the rule, identities that keep trials apart, and a larger budget that trains only
the new trials (pipeline.search_job, pipeline.train_job, pipeline.tracking)."""

import json

import pandas as pd
import pytest

from test_train_job import job, setting  # noqa: F401 (setting: the module fixture of tiny tables and a store)

from pipeline import aggregate, search, selection, trial_table, verify
from pipeline.errors import InputError
from pipeline.tracking import PARENT_TAG, ROLE_TAG, SUPERSEDED_TAG, TRIAL_TAG, client_for, experiment_id, log_run
from pipeline.tracking import supersede_previous
from pipeline.train_job import run_train_job

RULES = ("source-holdout", "target-peek")
WEIGHTS = [{"penalty.weight": 1.0}, {"penalty.weight": 30.0}]


def searched(unit_job, trials, seed=0):
    return {"job": unit_job, "seed": seed, "search": {"budget": len(trials), "trials": trials}}


def run(folder, uri, units, name, **options):
    return run_train_job(folder / "split.json", units, [folder / f"{name}-{i}.json" for i in range(len(units))],
                         uri, "unit", "c1", **options)


def runs_of(client, record):
    return [client.get_run(trial["run_id"]) for trial in record["search"]["trials"]]


@pytest.fixture(scope="module")
def irm_search(setting):  # noqa: F811
    folder, uri = setting
    irm = job("linear", {}, penalty="irm")
    irm["fit"] = {**irm["fit"], "max_steps": 20}
    record = run(folder, uri, [searched(irm, WEIGHTS)], "irm")[0]
    return folder, uri, irm, record


def test_trials_are_child_runs_of_the_parent_that_the_record_names(irm_search):
    _, uri, _, record = irm_search
    client = client_for(uri)
    parent = client.get_run(record["run_id"])
    trials = runs_of(client, record)
    assert parent.data.tags[ROLE_TAG] == "parent" and TRIAL_TAG not in parent.data.tags
    assert [t.data.tags[PARENT_TAG] for t in trials] == [record["run_id"]] * 2
    assert [json.loads(t.data.tags[TRIAL_TAG]) for t in trials] == WEIGHTS
    assert [t.data.params["penalty.weight"] for t in trials] == ["1.0", "30.0"]
    assert len({t.data.tags["unit_digest"] for t in trials} | {parent.data.tags["unit_digest"]}) == 3
    assert all(SUPERSEDED_TAG not in r.data.tags for r in [parent, *trials])


def test_each_rule_reports_the_trial_it_selects_and_the_grid_reads_that_trial(irm_search):
    folder, uri, _, record = irm_search
    client = client_for(uri)
    parent, trials = client.get_run(record["run_id"]), runs_of(client, record)
    for rule in RULES:
        scores = [t.data.metrics[f"{rule}.{selection.SCORE}"] for t in trials]
        chosen = scores.index(min(scores))
        assert record["search"]["selected"][rule] == chosen
        assert parent.data.tags[f"search.selected.{rule}"] == trials[chosen].info.run_id
        assert parent.data.metrics[f"{rule}.target_mae"] == trials[chosen].data.metrics[f"{rule}.target_mae"]
        # the parent's predictions under the rule are that trial's (what the grid's statistics read)
        frame = pd.read_parquet(client.download_artifacts(parent.info.run_id, "predictions/target_predictions.parquet",
                                                          str(folder)))
        mine = pd.read_parquet(client.download_artifacts(trials[chosen].info.run_id,
                                                         "predictions/target_predictions.parquet", str(folder)))
        pd.testing.assert_frame_equal(frame[frame.selection == rule].reset_index(drop=True),
                                      mine[mine.selection == rule].reset_index(drop=True))
    head = record["search"]["selected"]["source-holdout"]
    assert record["metrics"]["target_mae"] == trials[head].data.metrics["target_mae"]
    runs, _ = aggregate.collect_runs([folder / "irm-0.json"])
    assert runs.loc[0, "run_id"] == record["run_id"]
    assert runs.loc[0, "param.trial.penalty.weight"] == str(WEIGHTS[head]["penalty.weight"])
    table = trial_table.collect(runs, "mae", list(RULES), aggregate.read_record)
    assert list(table["search.penalty.weight"]) == [1.0, 30.0]
    assert [("source-holdout" in chosen.split(";")) for chosen in table["selected_by"]] == [head == 0, head == 1]
    assert list(table["source-holdout.target_mae"]) == [t.data.metrics["source-holdout.target_mae"] for t in trials]


def test_two_penalty_weights_never_supersede_each_other(irm_search):
    folder, uri, irm, first = irm_search
    again = run(folder, uri, [searched(irm, WEIGHTS)], "irm-again", reuse=False)[0]  # everything retrained
    client = client_for(uri)
    old, new = runs_of(client, first), runs_of(client, again)
    for before, after in zip(old, new):  # each trial is superseded by the new trial of the same weight only
        assert client.get_run(before.info.run_id).data.tags[SUPERSEDED_TAG] == after.info.run_id
        assert SUPERSEDED_TAG not in client.get_run(after.info.run_id).data.tags
    assert again["supersedes"] == [first["run_id"]]  # the parent supersedes the parent, never a trial


def test_a_plain_run_or_parent_never_supersedes_a_trial_and_a_trial_only_its_own_values(setting):  # noqa: F811
    _, uri = setting
    client = client_for(uri)
    exp = experiment_id(client, "unit")
    identity = {"split_id": "s", "model": "m", "penalty": "irm", "seed": "0"}

    def logged(**tags):
        return log_run(client, exp, run_name="r", params={}, metrics={}, curves={}, tags={**identity, **tags},
                       artifacts={})

    plain, a, b = logged(), logged(**{TRIAL_TAG: '{"w":1}'}), logged(**{TRIAL_TAG: '{"w":2}'})
    assert supersede_previous(client, exp, identity, logged(**{ROLE_TAG: "parent"})) == [plain]
    assert supersede_previous(client, exp, identity, logged(**{TRIAL_TAG: '{"w":1}'})) == [a]
    assert SUPERSEDED_TAG not in client.get_run(b).data.tags


def test_a_larger_budget_trains_only_the_new_trials_and_the_same_budget_nothing(setting):  # noqa: F811
    folder, uri = setting
    client = client_for(uri)
    ridge = job("ridge", {"alpha": 1.0})
    declared = {"model.alpha": {"spec": {"log_uniform": [0.01, 100.0]}, "field": "f", "owner": "o"}}
    count = lambda: len(client.search_runs([experiment_id(client, "unit")], max_results=5000))  # noqa: E731
    before = count()
    two = run(folder, uri, [searched(ridge, search.trial_values(declared, 0, 2))], "ridge")[0]
    assert count() == before + 3  # 2 trials + their parent
    four = run(folder, uri, [searched(ridge, search.trial_values(declared, 0, 4))], "ridge")[0]
    assert count() == before + 3 + 3  # only trials 2 and 3 trained, and a new parent
    assert [t["reused"] for t in four["search"]["trials"]] == [True, True, False, False]
    assert [t["run_id"] for t in four["search"]["trials"][:2]] == [t["run_id"] for t in two["search"]["trials"]]
    assert four["supersedes"] == [two["run_id"]]
    assert {client.get_run(t["run_id"]).data.tags[PARENT_TAG] for t in four["search"]["trials"]} == {four["run_id"]}
    same = run(folder, uri, [searched(ridge, search.trial_values(declared, 0, 4))], "ridge")[0]
    assert count() == before + 6 and same["reused"] and same["run_id"] == four["run_id"]
    # a closed-form family is selected by its validation risk like the others (one evaluation at step 0)
    scores = [t[f"source-holdout.{selection.SCORE}"] for t in four["search"]["trials"]]
    assert all(score > 0 for score in scores)
    assert four["search"]["selected"]["source-holdout"] == scores.index(min(scores))


def test_verify_refuses_a_parent_and_names_its_selected_trials(irm_search):
    folder, uri, _, record = irm_search
    client = client_for(uri)
    with pytest.raises(InputError) as error:
        verify.retrain(client, client.get_run(record["run_id"]), uri, folder, "clean")
    assert record["search"]["trials"][record["search"]["selected"]["source-holdout"]]["run_id"] in str(error.value)
    assert "\n" not in str(error.value)
