"""Split planning (schemes, ids, validation) and building (time blocks, gaps, digests) on tiny tables."""

import hashlib
import json
import re
from math import comb

import pandas as pd
import pytest

from pipeline.errors import InputError
from pipeline.splits import (SplitConfig, admitted_target_block, build_split, hours_needed, plan_splits,
                             write_split)
from synthetic_clean import START, clean_table, station_table

LOOKBACK, HORIZON = 12, 6
LAYOUT = {
    "avel": [("avel_a", 0.0, 0.0), ("avel_b", 0.0, 0.05), ("avel_c", 0.5, 0.5)],
    "brum": [("brum_a", 5.0, 5.0), ("brum_b", 5.0, 5.3)],
    "cosk": [("cosk_a", 9.0, 9.0), ("cosk_b", 9.01, 9.0), ("cosk_c", 9.02, 9.0), ("cosk_d", 9.5, 9.0)],
    "dorn": [("dorn_a", -5.0, 3.0)],
}
STATIONS = station_table(LAYOUT)
CITIES = sorted(LAYOUT)
ID_PATTERN = re.compile(r"^[a-z0-9+\-]+$")


def plan(**settings):
    return plan_splits(settings, STATIONS, LOOKBACK, HORIZON)


def ids(items):
    return [item["split_id"] for item in items]


def test_loco_has_one_split_per_city_with_all_other_cities_as_sources():
    items = plan(schemes=["loco"])
    assert len(items) == len(CITIES)
    for item in items:
        assert item["sources"] == [c for c in CITIES if c != item["target"]]
        assert set(item["source_stations"]) == {s for c in item["sources"] for s, _, _ in LAYOUT[c]}
        assert item["target_stations"] == sorted(s for s, _, _ in LAYOUT[item["target"]])
        assert item["gap_hours"] == LOOKBACK + HORIZON
        assert item["blocks"] == {"train": 0.6, "val": 0.2, "test": 0.2}


@pytest.mark.parametrize("sizes", [[1], [1, 2], [1, 2, 3]])
def test_subsets_count_follows_the_binomial_sum(sizes):
    # combinatorics: each of n targets takes every j-subset of the n - 1 other cities, j in sizes
    n = len(CITIES)
    items = plan(schemes=["subsets"], subset_sizes=sizes)
    assert len(items) == n * sum(comb(n - 1, j) for j in sizes)
    assert len(set(ids(items))) == len(items)
    assert all(item["target"] not in item["sources"] for item in items)


def test_a_loco_split_equal_to_a_subset_is_listed_once_under_loco():
    items = plan(schemes=["subsets", "loco"], subset_sizes=[1, 2, 3])
    n = len(CITIES)
    assert len(items) == n * (comb(n - 1, 1) + comb(n - 1, 2) + comb(n - 1, 3))  # loco = the 3-subsets
    full = [item for item in items if len(item["sources"]) == n - 1]
    assert len(full) == n and all(item["scheme"] == "loco" for item in full)
    assert ids(items)[:n] == ids(plan(schemes=["loco"]))  # loco first, same ids as loco alone


def test_subset_limit_is_deterministic_and_spread_over_targets():
    items = plan(schemes=["subsets"], subset_sizes=[1, 2], subset_limit=5)
    assert len(items) == 5
    assert {item["target"] for item in items} == set(CITIES)
    assert ids(items) == ids(plan(schemes=["subsets"], subset_sizes=[1, 2], subset_limit=5))


def test_pairs_follow_the_config():
    items = plan(schemes=["pairs"], pairs=[{"sources": ["cosk", "avel"], "target": "brum"},
                                           {"sources": ["dorn"], "target": "avel"}])
    assert [(i["sources"], i["target"]) for i in items] == [(["avel", "cosk"], "brum"), (["dorn"], "avel")]
    assert items[0]["split_id"].startswith("pairs-avel+cosk-to-brum-")
    with pytest.raises(InputError, match=r"split\.pairs\[0\].*'nowhere'"):
        plan(schemes=["pairs"], pairs=[{"sources": ["nowhere"], "target": "brum"}])
    with pytest.raises(InputError, match=r"split\.pairs\[0\]"):
        plan(schemes=["pairs"], pairs=[{"sources": ["brum"], "target": "brum"}])


def test_within_city_partitions_the_stations():
    city_ids = sorted(s for s, _, _ in LAYOUT["cosk"])
    (item,) = plan(schemes=["within"], within_city="cosk")
    assert item["sources"] == ["cosk"] and item["target"] == "cosk"
    assert not set(item["source_stations"]) & set(item["target_stations"])
    assert sorted(item["source_stations"] + item["target_stations"]) == city_ids
    assert len(item["target_stations"]) == 1  # about a third of 4
    (chosen,) = plan(schemes=["within"], within_city="cosk", within_target_stations=["cosk_a", "cosk_d"])
    assert chosen["target_stations"] == ["cosk_a", "cosk_d"]
    assert chosen["source_stations"] == ["cosk_b", "cosk_c"]
    # city unit: source and held-out stations get distinct environment names
    assert list(chosen["environments"]) == ["cosk"]
    assert list(chosen["target_environments"]) == ["cosk-heldout"]
    with pytest.raises(InputError, match="split.within_target_stations"):
        plan(schemes=["within"], within_city="cosk", within_target_stations=["avel_a"])
    with pytest.raises(InputError, match="split.within_city"):
        plan(schemes=["within"], within_city="dorn")  # a single station cannot be split
    with pytest.raises(InputError, match="split.within_target_stations"):
        plan(schemes=["within"], within_city="brum", within_target_stations=["brum_a", "brum_b"])


@pytest.mark.parametrize("unit", ["city", "station", "cluster"])
def test_environments_cover_the_source_stations_exactly_once(unit):
    for item in plan(schemes=["loco"], environment=unit, cluster_km=10.0):
        members = [s for group in item["environments"].values() for s in group]
        assert sorted(members) == item["source_stations"]
        targets = [s for group in item["target_environments"].values() for s in group]
        assert sorted(targets) == item["target_stations"]
        assert not set(item["environments"]) & set(item["target_environments"])
    (cosk_target,) = [i for i in plan(schemes=["loco"], environment=unit) if i["target"] == "avel"]
    if unit == "cluster":  # cosk_a/b/c are ~1.1 km apart, cosk_d ~55 km away
        assert cosk_target["environments"]["cosk-c1"] == ["cosk_a", "cosk_b", "cosk_c"]
        assert cosk_target["environments"]["cosk-c2"] == ["cosk_d"]


def test_ids_are_unique_well_formed_and_stable():
    settings = dict(schemes=["loco", "subsets", "pairs", "within"], subset_sizes=[1, 2],
                    pairs=[{"sources": ["avel"], "target": "dorn"}], within_city="cosk")
    first = plan(**settings)
    assert len(set(ids(first))) == len(first)
    assert all(ID_PATTERN.match(i) for i in ids(first))
    shuffled = STATIONS.sample(frac=1.0, random_state=1)
    assert ids(plan_splits(settings, shuffled, LOOKBACK, HORIZON)) == ids(first)
    assert ids(plan_splits(SplitConfig(**settings), STATIONS, LOOKBACK, HORIZON)) == ids(first)


@pytest.mark.parametrize("change", [dict(blocks={"train": 0.7, "val": 0.15, "test": 0.15}),
                                    dict(gap_hours=40), dict(environment="station"),
                                    dict(target_train_fraction=0.1)])
def test_ids_change_with_a_split_setting(change):
    before, after = ids(plan(schemes=["loco"])), ids(plan(schemes=["loco"], **change))
    assert not set(before) & set(after)


@pytest.mark.parametrize("change", [dict(subset_limit=3), dict(cluster_km=2.0), dict(subset_sizes=[1]),
                                    dict(pairs=[{"sources": ["avel"], "target": "dorn"}])])
def test_ids_do_not_change_with_an_unrelated_setting(change):
    assert ids(plan(schemes=["loco"])) == ids(plan(schemes=["loco"], **change))


def test_explicit_gap_makes_ids_independent_of_the_forecast_lengths():
    a = plan_splits({"gap_hours": 100}, STATIONS, 12, 6)
    b = plan_splits({"gap_hours": 100}, STATIONS, 48, 24)
    assert ids(a) == ids(b)


def test_hydra_structured_config_is_accepted():
    from omegaconf import OmegaConf
    cfg = OmegaConf.merge(OmegaConf.structured(SplitConfig),
                          {"schemes": ["pairs"], "pairs": [{"sources": ["avel", "brum"], "target": "dorn"}]})
    (item,) = plan_splits(cfg, STATIONS, LOOKBACK, HORIZON)
    assert item["sources"] == ["avel", "brum"]


@pytest.mark.parametrize("settings, field", [
    (dict(schemes=["random"]), "split.schemes"),
    (dict(cities=["avel", "atlantis"]), "split.cities"),
    (dict(target_train_fraction=1.5), "split.target_train_fraction"),
    (dict(blocks={"train": 0.6, "val": 0.3, "test": 0.3}), "split.blocks"),
    (dict(blocks={"train": 0.6, "test": 0.4}), "split.blocks"),
    (dict(gap_hours=LOOKBACK + HORIZON - 1), "split.gap_hours"),
    (dict(environment="province"), "split.environment"),
    (dict(schemes=["subsets"], subset_sizes=[4]), "split.subset_sizes"),
    (dict(colour="red"), "split.colour"),
])
def test_bad_settings_name_the_config_field(settings, field):
    with pytest.raises(InputError, match=re.escape(field)):
        plan(**settings)


def test_cities_restricts_the_plan():
    items = plan(schemes=["loco"], cities=["brum", "avel"])
    assert [(i["sources"], i["target"]) for i in items] == [(["brum"], "avel"), (["avel"], "brum")]


# ---- building ----------------------------------------------------------------------------------

def write_tables(tmp_path, ranges):
    """{city: (start offset h, hours)} -> {city: parquet path} of synthetic clean tables."""
    paths = {}
    for city, (offset, hours) in ranges.items():
        table = clean_table([s for s, _, _ in LAYOUT[city]], hours, start=START + pd.Timedelta(hours=offset))
        paths[city] = tmp_path / f"{city}.parquet"
        table.to_parquet(paths[city])
    return paths


def test_blocks_are_ordered_disjoint_and_separated_by_the_gap(tmp_path):
    paths = write_tables(tmp_path, {"avel": (0, 500), "brum": (30, 500), "cosk": (10, 450), "dorn": (0, 520)})
    item = [i for i in plan(schemes=["loco"], target_train_fraction=0.25) if i["target"] == "dorn"][0]
    record = build_split(item, paths, LOOKBACK, HORIZON)
    blocks = {k: [pd.Timestamp(t) for t in v] for k, v in record["time_blocks"].items()}
    hour = pd.Timedelta(hours=1)
    assert blocks["train"][0] == START + 30 * hour  # latest start among the cities
    assert blocks["test"][1] <= START + 460 * hour  # earliest end (cosk: 10 + 450)
    for earlier, later in (("train", "val"), ("val", "test")):
        assert blocks[earlier][0] < blocks[earlier][1]
        gap = (blocks[later][0] - blocks[earlier][1]) / hour
        assert gap == item["gap_hours"] >= LOOKBACK + HORIZON
    lengths = {k: (v[1] - v[0]) / hour for k, v in blocks.items()}
    usable = 430 - 2 * item["gap_hours"]
    assert lengths == {"train": int(usable * 0.6), "val": int(usable * 0.2),
                       "test": usable - int(usable * 0.6) - int(usable * 0.2)}
    admitted = [pd.Timestamp(t) for t in record["admitted_target_block"]]
    assert admitted[1] == blocks["train"][1]  # the last part of the target's train block
    assert (admitted[1] - admitted[0]) / hour == int(0.25 * lengths["train"])
    assert record["input_digests"] == {c: hashlib.sha256(paths[c].read_bytes()).hexdigest() for c in CITIES}
    assert record["inputs"] == {c: str(paths[c]) for c in CITIES}
    assert {k: record[k] for k in item} == item  # the plan travels unchanged


def test_too_short_range_is_a_clear_error_with_hours_needed_and_available(tmp_path):
    needed = hours_needed({"train": 0.6, "val": 0.2, "test": 0.2}, LOOKBACK + HORIZON, LOOKBACK + HORIZON)
    item = [i for i in plan(schemes=["pairs"], pairs=[{"sources": ["avel"], "target": "brum"}])][0]
    ok = build_split(item, write_tables(tmp_path, {"avel": (0, needed), "brum": (0, needed)}),
                     LOOKBACK, HORIZON)
    lengths = [(pd.Timestamp(b) - pd.Timestamp(a)) / pd.Timedelta(hours=1) for a, b in ok["time_blocks"].values()]
    assert min(lengths) >= LOOKBACK + HORIZON  # each block holds at least one window
    short = write_tables(tmp_path, {"avel": (0, needed - 1), "brum": (0, needed)})
    with pytest.raises(InputError, match=f"has {needed - 1} h.*need {needed} h") as error:
        build_split(item, short, LOOKBACK, HORIZON)
    assert "\n" not in str(error.value)


def test_build_rejects_naive_times_and_missing_tables(tmp_path):
    item = plan(schemes=["pairs"], pairs=[{"sources": ["avel"], "target": "brum"}])[0]
    paths = write_tables(tmp_path, {"avel": (0, 300), "brum": (0, 300)})
    with pytest.raises(InputError, match="no clean table given for city 'brum'"):
        build_split(item, {"avel": paths["avel"]}, LOOKBACK, HORIZON)
    naive = clean_table(["brum_a"], 300)
    naive["time"] = naive["time"].dt.tz_localize(None)
    naive.to_parquet(paths["brum"])
    with pytest.raises(InputError, match="brum.parquet: time: must be datetime64 with tz=UTC"):
        build_split(item, paths, LOOKBACK, HORIZON)


def test_admitted_block_is_the_last_fraction_of_train():
    blocks = {"train": ["2030-01-01T00:00:00+00:00", "2030-01-11T00:00:00+00:00"]}
    assert admitted_target_block(blocks, 0.0) is None
    assert admitted_target_block(blocks, 0.1) == ["2030-01-10T00:00:00+00:00", "2030-01-11T00:00:00+00:00"]


def test_write_split_is_atomic_json_with_sorted_keys(tmp_path):
    record = {"split_id": "loco-a-to-b-000000", "blocks": {"val": 0.2, "train": 0.6}, "a": [1, 2]}
    target = tmp_path / "splits" / "x.json"
    write_split(record, target)
    text = target.read_text()
    assert json.loads(text) == record
    assert text.index('"a"') < text.index('"blocks"') < text.index('"split_id"')
    assert text.index('"train"') < text.index('"val"')
    assert [p.name for p in target.parent.iterdir()] == ["x.json"]  # no temporary file left behind
