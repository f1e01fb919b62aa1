"""Hyperparameter search, the parts without MLflow: declared spaces, deterministic trials, the fairness rules
checked while planning, and the selection of a trial by a rule (pipeline.search, pipeline.selection)."""

import math

import numpy as np
import pytest

from pipeline import search, selection, twins
from pipeline.errors import InputError
from pipeline.search_job import parent_metrics

FIT = {"max_steps": 50, "batch_size": 16, "lr": 1e-3, "weight_decay": 0.0, "eval_every": 5, "patience": 8,
       "grad_clip": 1.0, "threads": 1, "sampling": "balanced"}


def job(model="linear", penalty="erm", warmup=10, family=None):
    spec = None if penalty == "na" else {"name": penalty, "weight": 0.0 if penalty == "erm" else 100.0,
                                          "warmup_steps": warmup, "extra": {}}
    return {"model_name": model, "model": {"family": family or model, "level": "none"}, "penalty": spec,
            "penalty_name": penalty, "fit": dict(FIT), "selection": {"rule": "source-holdout", "also": []}}


def units(penalties=("erm", "irm"), seeds=(0, 1), model="linear"):
    return [{"model": model, "penalty": p, "seed": s, "job": job(model, p)} for p in penalties for s in seeds]


def space(**specs):
    return {key.replace("__", "."): {"spec": spec, "field": f"search.x.{key}", "owner": "search.x"}
            for key, spec in specs.items()}


FINITE = space(fit__lr={"choices": [1e-3, 3e-3, 1e-2]}, penalty__weight={"choices": [1.0, 10.0]})
MIXED = space(fit__lr={"log_uniform": [1e-4, 1e-1]}, penalty__weight={"choices": [1.0, 10.0, 100.0]},
              fit__weight_decay={"uniform": [0.0, 0.1]})


@pytest.mark.parametrize("declared", [FINITE, MIXED], ids=["finite", "mixed"])
def test_trial_i_is_a_function_of_space_seed_and_i_so_a_larger_budget_keeps_the_earlier_trials(declared):
    four = search.trial_values(declared, seed=7, count=4)
    assert four == search.trial_values(declared, seed=7, count=4)  # deterministic
    assert search.trial_values(declared, seed=7, count=6)[:4] == four  # budget 4 -> 6: trials 0-3 unchanged
    assert search.trial_values(declared, seed=8, count=4) != four  # the search seed matters
    assert all(set(values) == set(declared) for values in four)


def test_a_finite_space_is_walked_without_repeats_and_an_empty_space_is_one_plain_trial():
    walked = search.trial_values(FINITE, seed=0, count=6)
    assert len({tuple(sorted(v.items())) for v in walked}) == 6 == search.space_size(FINITE)
    assert search.space_size(MIXED) is None
    assert search.trial_values({}, seed=0, count=5) == [{}]


def test_drawn_values_stay_in_range_cover_choices_per_round_and_are_shared_across_spaces():
    values = search.trial_values(MIXED, seed=3, count=300)
    lr = np.array([v["fit.lr"] for v in values])
    assert lr.min() >= 1e-4 and lr.max() <= 1e-1
    # log-uniform: about half of the draws below the geometric middle (1e-4 * 1e-1) ** 0.5
    assert 0.4 < (lr < math.sqrt(1e-5)).mean() < 0.6
    decay = np.array([v["fit.weight_decay"] for v in values])
    assert 0.4 < (decay < 0.05).mean() < 0.6
    for start in range(0, 300, 3):  # every round of 3 trials holds each of the 3 weights once
        assert sorted(v["penalty.weight"] for v in values[start:start + 3]) == [1.0, 10.0, 100.0]
    # ERM searching only fit.lr with the same spec gets the same learning rates, trial by trial
    erm = search.trial_values(space(fit__lr={"log_uniform": [1e-4, 1e-1]}), seed=3, count=300)
    assert [v["fit.lr"] for v in erm] == list(lr)


def test_apply_sets_the_values_and_names_them_without_touching_the_base_job():
    base = job("linear", "groupdro")
    trial = search.apply(base, {"penalty.weight": 10.0, "penalty.extra.eta": 0.1, "fit.lr": 0.003})
    assert trial["penalty"]["weight"] == 10.0 and trial["penalty"]["extra"]["eta"] == 0.1
    assert trial["fit"]["lr"] == 0.003 and trial[search.TRIAL_KEY] == {"fit.lr": 0.003, "penalty.extra.eta": 0.1,
                                                                      "penalty.weight": 10.0}
    assert base["penalty"]["weight"] == 100.0 and base["fit"]["lr"] == 1e-3 and search.TRIAL_KEY not in base
    assert search.trial_tags(trial)["search.trial"] != search.trial_tags(search.apply(base, {"penalty.weight": 1.0})
                                                                        )["search.trial"]
    assert search.trial_tags(base) == {}


def test_without_a_search_the_units_come_back_unchanged():
    planned = units()
    assert search.attach(planned, {"budget": 1, "seed": 0, "model": {}, "penalty": {}}, trainable=True) is planned


def test_every_method_gets_the_same_budget_erm_included():
    config = {"budget": 3, "seed": 0, "model": {},
              "penalty": {"erm": {"fit.lr": {"log_uniform": [1e-4, 1e-2]}},
                          "irm": {"penalty.weight": {"choices": [1.0, 10.0, 100.0]}}}}
    planned = search.attach(units(), config, trainable=True)
    assert [len(u["search"]["trials"]) for u in planned] == [3, 3, 3, 3]
    irm = [u for u in planned if u["penalty"] == "irm"]
    assert {v["penalty.weight"] for v in irm[0]["search"]["trials"]} == {1.0, 10.0, 100.0}
    assert irm[0]["search"]["trials"] == irm[1]["search"]["trials"]  # seeds share the trial values


@pytest.mark.parametrize("config, field", [
    ({"budget": 3, "penalty": {"erm": {"fit.lr": {"choices": [1e-3, 3e-3]}},
                               "irm": {"penalty.weight": {"choices": [1.0, 10.0, 100.0]}}}}, "search.penalty.erm"),
    ({"budget": 2, "penalty": {"irm": {"penalty.weight": {"choices": [1.0, 10.0]}}}}, "search.penalty.erm"),
    ({"budget": 2, "penalty": {"erm": {"fit.lr": {"choices": [1e-3, -1.0]}},
                               "irm": {"penalty.weight": {"choices": [1.0, 10.0]}}}}, "search.penalty.erm.fit.lr"),
    ({"budget": 2, "penalty": {"erm": {"fit.lrate": {"choices": [1e-3, 3e-3]}}}}, "search.penalty.erm.fit.lrate"),
    ({"budget": 2, "penalty": {"erm": {"model.family": {"choices": ["lstm", "gru"]}}}},
     "search.penalty.erm.model.family"),
    ({"budget": 2, "penalty": {"erm": {"fit.lr": {"uniform": [0.1, 0.01]}}}}, "search.penalty.erm.fit.lr"),
    ({"budget": 2, "penalty": {"erm": {"fit.lr": {"log_uniform": [0.0, 0.01]}}}}, "search.penalty.erm.fit.lr"),
    ({"budget": 2, "penalty": {"erm": {"fit.lr": {"choices": [0.1, 0.1]}}}}, "search.penalty.erm.fit.lr"),
    ({"budget": 2, "penalty": {"erm": {"fit.lr": {"between": [0.1, 0.2]}}}}, "search.penalty.erm.fit.lr"),
    ({"budget": 2, "model": {"linear": {"fit.lr": {"choices": [1e-3, 3e-3]}}},
      "penalty": {"erm": {"fit.lr": {"choices": [1e-3, 3e-3]}}}}, "search.penalty.erm.fit.lr"),
    ({"budget": 0}, "search.budget"),
])
def test_bad_search_config_is_one_line_naming_the_field(config, field):
    with pytest.raises(InputError) as error:
        search.attach(units(), {"seed": 0, "model": {}, "penalty": {}, **config}, trainable=True)
    assert error.value.field == field and "\n" not in str(error.value)


def test_closed_form_families_search_their_own_settings_and_have_no_penalty_to_search():
    ridge = [{"model": "ridge", "penalty": "na", "seed": 0, "job": job("ridge", "na")}]
    ridge[0]["job"]["model"]["alpha"] = 1.0
    config = {"budget": 2, "seed": 0, "model": {"ridge": {"model.alpha": {"choices": [0.1, 10.0]}}}, "penalty": {}}
    assert [v["model.alpha"] for v in search.attach(ridge, config, trainable=False)[0]["search"]["trials"]] in (
        [0.1, 10.0], [10.0, 0.1])
    config["penalty"] = {"irm": {"penalty.weight": {"choices": [1.0, 10.0]}}}  # not ridge's: ignored
    assert len(search.attach(ridge, config, trainable=False)[0]["search"]["trials"]) == 2
    with pytest.raises(InputError, match="no penalty"):
        search.attach(ridge, {"budget": 2, "seed": 0, "penalty": {},
                              "model": {"ridge": {"penalty.weight": {"choices": [1.0, 10.0]}}}}, trainable=False)
    persistence = [{"model": "persistence", "penalty": "na", "seed": 0, "job": job("persistence", "na")}]
    assert "search" not in search.attach(persistence, config, trainable=False)[0]  # empty space: runs once


def test_a_budget_without_any_space_and_unknown_names_are_refused(tmp_path):
    for group in ("model", "penalty"):
        (tmp_path / group).mkdir()
    (tmp_path / "penalty" / "irm.yaml").write_text("name: irm\n")
    with pytest.raises(InputError) as error:
        search.check_config({"budget": 3, "seed": 0, "model": {}, "penalty": {}}, tmp_path)
    assert error.value.field == "search.budget"
    with pytest.raises(InputError) as error:
        search.check_config({"budget": 2, "seed": 0, "model": {}, "penalty": {"irn": {}}}, tmp_path)
    assert error.value.field == "search.penalty.irn" and "irm" in str(error.value)
    search.check_config({"budget": 2, "seed": 0, "model": {}, "penalty": {"irm": {"penalty.weight": {
        "choices": [1.0, 2.0]}}}}, tmp_path)


def test_a_searched_warm_up_needs_the_same_warm_ups_among_the_erm_trials():
    def trial_units(erm_warmups):
        config = {"budget": 2, "seed": 0, "model": {},
                  "penalty": {"erm": {"penalty.warmup_steps": {"choices": erm_warmups}},
                              "irm": {"penalty.warmup_steps": {"choices": [5, 10]}}}}
        return search.trial_units(search.attach(units(seeds=(0,)), config, trainable=True))

    twins.check_units(trial_units([5, 10]))
    with pytest.raises(InputError, match="ERM twin"):
        twins.check_units(trial_units([10, 20]))


class TargetGuard(dict):
    """Trial metrics that refuse to be read anywhere but at one key: a rule reading more would raise."""

    def __init__(self, values, allowed):
        super().__init__(values)
        self.allowed = allowed

    def get(self, key, default=None):
        if key != self.allowed:
            raise AssertionError(f"read {key}")
        return super().get(key, default)

    __getitem__ = get


def trials_where_target_disagrees():
    # trial 0 is best on the source validation block, trial 1 on the target's (and on the test errors)
    return [{"source-holdout.selection_score": 1.0, "target-peek.selection_score": 9.0,
             "source-rotation.selection_score": 2.0, "source-holdout.target_mae": 9.0},
            {"source-holdout.selection_score": 3.0, "target-peek.selection_score": 1.0,
             "source-rotation.selection_score": 1.0, "source-holdout.target_mae": 1.0}]


@pytest.mark.parametrize("rule, chosen", [("source-holdout", 0), ("source-rotation", 1), ("target-peek", 1)])
def test_a_rule_selects_the_trial_by_its_own_score_and_reads_nothing_else(rule, chosen):
    key = f"{rule}.{selection.SCORE}"
    guarded = [TargetGuard(m, key) for m in trials_where_target_disagrees()]
    assert selection.choose_trial(rule, guarded) == chosen
    assert selection.choose_trial(rule, [{key: 2.0}, {key: 2.0}, {key: 1.0 + 1.0}]) == 0  # ties: earliest
    assert selection.choose_trial(rule, [{key: float("nan")}, {key: 5.0}]) == 1
    assert selection.choose_trial(rule, [{}, {}]) == 0  # nothing to compare: the first


def test_the_honest_scores_are_computed_without_target_data():
    history = [{"step": 5, "val/source/all": 2.0}, {"step": 10, "val/source/all": 1.0}]  # no target key at all
    step = selection.choose_step("source-holdout", history, [5, 10])
    assert (step, selection.score("source-holdout", history, step)) == (10, 1.0)
    rotation = {"a": {5: 3.0, 10: 1.0}, "b": {5: 1.0, 10: 2.0}}
    assert selection.score("source-rotation", history, 10, rotation) == 1.5
    assert math.isnan(selection.score("source-rotation", history, 10, None))  # one source group: no score
    assert math.isnan(selection.score("target-peek", history, 10))  # the peek has nothing to read here


def test_the_parent_takes_each_rules_results_from_the_trial_that_rule_selected():
    trials = [{"source-holdout.target_mae": 1.0, "target-peek.target_mae": 1.1, "target_mae": 1.0,
               "fit_seconds": 3.0, "curve.train_loss": 0.5},
              {"source-holdout.target_mae": 2.0, "target-peek.target_mae": 0.4, "target_mae": 2.0,
               "fit_seconds": 4.0, "curve.train_loss": 0.2}]
    merged = parent_metrics(["source-holdout", "target-peek"], "source-holdout",
                            {"source-holdout": 0, "target-peek": 1}, trials)
    assert merged == {"source-holdout.target_mae": 1.0, "target-peek.target_mae": 0.4, "target_mae": 1.0,
                      "fit_seconds": 3.0}


@pytest.fixture(scope="module")
def demo_plan():
    from pathlib import Path

    from pipeline.workflow import plan_workflow

    return plan_workflow(["experiment=demo"], Path(__file__).resolve().parents[1], cache=False)


def test_the_demo_searches_every_method_with_one_budget_and_two_weights_per_penalised_family(demo_plan):
    budget = demo_plan.cfg.search.budget
    assert budget >= 2
    searched = {}
    for job in demo_plan.jobs.values():
        for unit in job.units:
            if unit.get("search"):
                searched.setdefault((unit["model"], unit["penalty"]), []).append(unit["search"]["trials"])
                assert len(unit["search"]["trials"]) == budget
            else:  # only what has nothing to search runs once
                assert unit["model"] in ("persistence", "seasonal_naive")
    for model in demo_plan.trainable_models:
        assert (model, "erm") in searched and (model, "irm") in searched
        weights = {trial["penalty.weight"] for trials in searched[(model, "irm")] for trial in trials}
        assert len(weights) >= 2
    records = demo_plan.all_run_records()
    assert len(records) == len(set(records))  # one record per run: trials have none of their own
    assert '"search"' in next(iter(demo_plan.jobs.values())).params_json


def test_a_command_line_override_replaces_a_space_and_bad_ones_fail_in_one_line():
    from pathlib import Path

    from pipeline.config import compose_config
    from pipeline.canonical import to_container

    root = Path(__file__).resolve().parents[1]
    cfg = compose_config(["experiment=demo", "search.budget=3", "~search.penalty.irm",
                          "+search.penalty.irm={penalty.weight:{log_uniform:[1,1000]}}"], root)
    assert to_container(cfg.search.penalty.irm) == {"penalty.weight": {"log_uniform": [1, 1000]}}
    # overriding an existing entry merges into it (Hydra): two kinds in one spec are refused, naming the key
    merged = to_container(compose_config(["experiment=demo", "++search.penalty.irm={penalty.weight:{uniform:[1,9]}}"],
                                         root).search)
    irm = [{"model": "linear", "penalty": "irm", "seed": 0, "job": job("linear", "irm")}]
    with pytest.raises(InputError) as error:
        search.attach(irm, merged, trainable=True)
    assert error.value.field == "search.penalty.irm.penalty.weight"


def test_status_names_a_changed_search_as_the_reason():
    import json

    from pipeline.outdated import unit_changes

    def params(trials):
        unit = {"split_id": "s", "job": {**job("linear", "irm"), "model_name": "linear", "penalty_name": "irm"},
                "seed": 0, "search": {"budget": len(trials), "trials": trials}}
        return json.dumps([unit])

    two, three = [{"penalty.weight": 1.0}, {"penalty.weight": 10.0}], [{"penalty.weight": w} for w in (1.0, 10.0, 3.0)]
    assert unit_changes([params(two)], params(three)) == [("linear", "irm", "search")]
    assert unit_changes([params(two)], params(two)) == []
