"""Plan-time refusal of penalised runs with fewer than two training environments, the station/cluster
fallback that lets them run, and the ERM-twin protocol check (pipeline.environments, pipeline.twins)."""

from pathlib import Path

import pytest

from pipeline import environments, twins
from pipeline.errors import InputError
from pipeline.splits import plan_splits
from synthetic_clean import station_table

REPO = Path(__file__).resolve().parents[1]
LAYOUT = {
    "avel": [("avel_a", 0.0, 0.0), ("avel_b", 0.0, 0.05), ("avel_c", 0.5, 0.5)],
    "brum": [("brum_a", 5.0, 5.0), ("brum_b", 5.0, 5.3)],
    "cosk": [("cosk_a", 9.0, 9.0), ("cosk_b", 9.01, 9.0)],
    "dorn": [("dorn_a", -5.0, 3.0)],
}
STATIONS = station_table(LAYOUT)
STATION_CITY = dict(zip(STATIONS["station_id"], STATIONS["city"]))


def plan(**settings):
    return {item["split_id"]: item for item in plan_splits(settings, STATIONS, 12, 6)}


def job(penalty="irm", weight=100.0, rule="source-holdout", also=(), warmup=10, extra=None, fit=None):
    spec = None if penalty is None else {"name": penalty, "weight": weight, "warmup_steps": warmup,
                                         "extra": dict(extra or {})}
    return {"penalty": spec, "selection": {"rule": rule, "also": list(also)},
            "fit": {"max_steps": 50, "sampling": "balanced", "validation_windows": "non_overlapping", **(fit or {})}}


def one_source(**settings):
    splits = plan(schemes=["pairs"], pairs=[{"sources": ["avel"], "target": "brum"}], **settings)
    return next(iter(splits.values()))


def test_one_source_city_is_one_environment_and_a_penalised_run_is_refused_in_one_line():
    split = one_source()
    assert environments.training_environment_count(split) == 1
    for name in ("irm", "vrex", "groupdro"):
        with pytest.raises(InputError, match=f"penalty {name} needs >= 2 training environments") as caught:
            environments.check_environments(split, job(name), STATION_CITY)
        assert "\n" not in str(caught.value) and "split.environment" in str(caught.value)
    environments.check_environments(split, job("erm", weight=0.0), STATION_CITY)  # ERM is ERM: fine
    environments.check_environments(split, job("irm", weight=0.0), STATION_CITY)  # weight 0 is ERM too
    environments.check_environments(split, job(None), STATION_CITY)  # closed-form families: no penalty
    with pytest.raises(InputError):  # a warm-up weight above 0 penalises too
        environments.check_environments(split, job("vrex", weight=0.0, extra={"warmup_weight": 1.0}), STATION_CITY)


def test_an_admitted_target_fraction_is_a_second_training_environment():
    split = one_source(target_train_fraction=0.2)
    assert environments.training_environment_count(split) == 2
    environments.check_environments(split, job("irm"), STATION_CITY)


def test_fallback_to_stations_only_where_needed_and_other_split_ids_unchanged():
    plain = plan(schemes=["subsets"], subset_sizes=[1, 2])
    fallen = plan(schemes=["subsets"], subset_sizes=[1, 2], environment_fallback="station")
    two_source = [sid for sid, item in plain.items() if len(item["sources"]) == 2]
    assert two_source and set(two_source) <= set(fallen)  # content, hence id, unchanged where not needed
    changed = [item for item in fallen.values() if "environment_fallback_from" in item]
    assert {len(item["sources"]) for item in changed} == {1}
    for item in changed:
        assert item["environment"] == "station" and item["environment_fallback_from"] == "city"
        assert sorted(item["environments"]) == sorted(item["source_stations"])
        assert environments.describe(item) == "station (fallback from city)"
    # A one-station city cannot be rescued: the penalised run is still refused.
    dorn = [item for item in changed if item["sources"] == ["dorn"]]
    assert dorn and environments.training_environment_count(dorn[0]) == 1
    with pytest.raises(InputError, match="needs >= 2 training environments"):
        environments.check_environments(dorn[0], job("irm"), STATION_CITY)
    avel = [item for item in changed if item["sources"] == ["avel"]][0]
    assert environments.training_environment_count(avel) == 3
    environments.check_environments(avel, job("irm"), STATION_CITY)
    assert environments.describe(plain[two_source[0]]) == "city"


def test_cluster_fallback_and_bad_fallback_values():
    item = one_source(environment_fallback="cluster", cluster_km=10.0)  # a, b 5.6 km apart; c ~78 km away
    assert item["environment"] == "cluster" and len(item["environments"]) == 2
    for bad in ("city", "region"):
        with pytest.raises(InputError, match="split.environment_fallback"):
            plan(schemes=["loco"], environment_fallback=bad)


def test_source_rotation_refits_need_two_environments_too():
    two = plan(schemes=["pairs"], pairs=[{"sources": ["avel", "brum"], "target": "cosk"}])
    split = next(iter(two.values()))
    assert environments.refit_environment_counts(split, STATION_CITY) == {"avel": 1, "brum": 1}
    environments.check_environments(split, job("irm"), STATION_CITY)  # two environments, no rotation: fine
    with pytest.raises(InputError, match="refit without avel trains on 1 environment"):
        environments.check_environments(split, job("irm", also=["source-rotation"]), STATION_CITY)
    environments.check_environments(split, job("erm", weight=0.0, rule="source-rotation"), STATION_CITY)
    three = plan(schemes=["pairs"], pairs=[{"sources": ["avel", "brum", "cosk"], "target": "dorn"}])
    environments.check_environments(next(iter(three.values())), job("irm", rule="source-rotation"), STATION_CITY)
    # Within one city the rotation groups are the environments (stations here).
    within = plan(schemes=["within"], within_city="avel", within_target_stations=["avel_c"], environment="station")
    split = next(iter(within.values()))
    assert environments.rotation_groups(split, STATION_CITY) == {"avel_a": {"avel_a"}, "avel_b": {"avel_b"}}
    with pytest.raises(InputError, match="source-rotation"):
        environments.check_environments(split, job("vrex", rule="source-rotation"), STATION_CITY)


def test_check_units_covers_every_split_and_penalty():
    splits = plan(schemes=["subsets"], subset_sizes=[2])
    units = [{"penalty": p, "seed": s, "job": job(p, weight=0.0 if p == "erm" else 10.0)}
             for p in ("erm", "irm") for s in (0, 1)]
    environments.check_units(splits, units, STATION_CITY)
    splits.update(plan(schemes=["pairs"], pairs=[{"sources": ["cosk"], "target": "avel"}]))
    with pytest.raises(InputError, match="pairs-cosk-to-avel"):
        environments.check_units(splits, units, STATION_CITY)


# ---- ERM twins: same protocol (pipeline.twins) ---------------------------------------------------------
def units_of(*specs):
    return [{"model": "linear", "penalty": name, "seed": 0, "job": spec} for name, spec in specs]


def test_twins_with_the_same_schedule_and_sampling_pass():
    twins.check_units(units_of(("erm", job("erm", weight=0.0)), ("irm", job("irm")), ("vrex", job("vrex"))))
    twins.check_units(units_of(("irm", job("irm")), ("vrex", job("vrex", warmup=20))))  # no ERM run: no twin
    assert twins.treatment(job("erm", weight=0.0)) == twins.treatment(job("irm"))
    assert twins.treatment(job("irm", extra={"reset_optimizer": False}))["optimizer_reset_at"] is None
    assert twins.treatment(job("irm", warmup=0))["optimizer_reset_at"] is None


@pytest.mark.parametrize("penalised,field", [
    (job("irm", warmup=20), "penalty.warmup_steps"),  # reset and selection window at another step
    (job("irm", extra={"reset_optimizer": False}), "penalty.extra.reset_optimizer"),  # reset on one side only
    (job("irm", fit={"sampling": "pooled"}), "fit.sampling"),  # batch composition
    (job("irm", fit={"validation_windows": "all"}), "fit.validation_windows"),  # checkpoints picked elsewhere
])
def test_a_twin_under_another_protocol_is_refused(penalised, field):
    with pytest.raises(InputError, match=field) as caught:
        twins.check_units(units_of(("erm", job("erm", weight=0.0)), ("irm", penalised)))
    assert "ERM twin" in str(caught.value) and "\n" not in str(caught.value)


def test_a_warmup_as_long_as_the_fit_leaves_nothing_to_select():
    with pytest.raises(InputError, match="penalty.warmup_steps.*no step after the warm-up"):
        twins.check_units(units_of(("irm", job("irm", warmup=50))))
    twins.check_units(units_of(("irm", job("irm", warmup=49))))


def test_shipped_penalties_share_one_twin_protocol():
    import yaml

    jobs = {}
    for path in sorted((REPO / "config" / "penalty").glob("*.yaml")):
        spec = yaml.safe_load(path.read_text())
        spec.setdefault("extra", {})
        jobs[path.stem] = {"penalty": spec, "fit": {"max_steps": 300}}
    assert set(jobs) == {"erm", "irm", "vrex", "groupdro"}
    assert len({str(twins.treatment(j)) for j in jobs.values()}) == 1, {k: twins.treatment(j) for k, j in jobs.items()}


def test_the_shipped_full_experiment_plans_no_penalised_run_on_one_environment():
    from pipeline.config import compose_config, job_slice, to_container
    from pipeline.stations import load_stations

    def penalised_units(overrides):
        cfg = compose_config(overrides, REPO)
        stations = load_stations(REPO / cfg.data.stations)
        splits = {item["split_id"]: item for item in plan_splits(
            to_container(cfg.split), stations, cfg.forecast.lookback_hours, cfg.forecast.horizon_hours)}
        units = [{"penalty": name, "seed": 0,
                  "job": job_slice(compose_config([*overrides, f"penalty={name}"], REPO), "linear", name)}
                 for name in cfg.sweep.penalties]
        station_city = dict(zip(stations["station_id"], stations["city"]))
        return splits, units, station_city

    splits, units, station_city = penalised_units(["experiment=full"])
    assert {u["penalty"] for u in units} == {"erm", "irm", "vrex", "groupdro"}
    fallen = [s for s in splits.values() if s.get("environment_fallback_from")]
    assert fallen and all(len(s["sources"]) == 1 for s in fallen)  # the one-source subsets
    environments.check_units(splits, units, station_city)
    twins.check_units(units)
    # The same experiment without the fallback would plan ERM in disguise: refused before any job runs.
    with pytest.raises(InputError, match="needs >= 2 training environments"):
        environments.check_units(*penalised_units(["experiment=full", "split.environment_fallback=null"]))
