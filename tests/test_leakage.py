"""Leakage canary: extreme values planted where training must not look change nothing it learns from.

Build the windows once, plant 1e6 (in every variable of the rows) into a block that training must not
see, rebuild, and require the fitted scaler statistics and the training windows to be bitwise equal.
A positive control plants into the source train block and must move them, so the canary can fail.
"""

import numpy as np
import pandas as pd
import pytest

from pipeline.splits import admitted_target_block, compute_time_blocks, plan_splits
from pipeline.variables import VARIABLE_NAMES
from pipeline.windows import ForecastConfig, build_windows
from synthetic_clean import START, clean_table, station_table, with_qc

L, H, HOURS = 12, 6, 360
HOUR = pd.Timedelta(hours=1)
EXTREME = 1e6
LAYOUT = {"avel": [("avel_a", 0.0, 0.0), ("avel_b", 0.0, 0.3)], "brum": [("brum_a", 5.0, 5.0)],
          "cosk": [("cosk_a", 9.0, 9.0), ("cosk_b", 9.0, 9.5)]}
SOURCES, TARGET = ("avel", "brum"), "cosk"
CONFIG = ForecastConfig(lookback_hours=L, horizon_hours=H, fill_limit_hours=3)


def tables():
    return {city: clean_table([s for s, _, _ in rows], HOURS, seed=i) for i, (city, rows) in enumerate(LAYOUT.items())}


def record(fraction=0.0):
    item = next(i for i in plan_splits({"target_train_fraction": fraction}, station_table(LAYOUT), L, H)
                if i["target"] == TARGET)
    blocks = compute_time_blocks(START, START + HOURS * HOUR, item["blocks"], item["gap_hours"], L + H)
    return {**item, "time_blocks": blocks, "admitted_target_block": admitted_target_block(blocks, fraction)}


def span(split, block):
    if block == "gap":  # the hours between train and val
        return pd.Timestamp(split["time_blocks"]["train"][1]), pd.Timestamp(split["time_blocks"]["val"][0])
    if block == "train_before_admitted":
        return pd.Timestamp(split["time_blocks"]["train"][0]), pd.Timestamp(split["admitted_target_block"][0])
    return tuple(pd.Timestamp(t) for t in split["time_blocks"][block])


def plant(data, cities, start, end):
    """EXTREME into every variable at the first, a middle and the last hour of [start, end)."""
    hours = [start, start + ((end - start) // HOUR // 2) * HOUR, end - HOUR]
    planted = dict(data)
    for city in cities:
        table = data[city].copy()
        table.loc[table["time"].isin(hours), list(VARIABLE_NAMES)] = EXTREME
        planted[city] = with_qc(table)
    return planted


def assert_same(a, b):
    assert np.array_equal(a.scaler.mean_, b.scaler.mean_)
    assert np.array_equal(a.scaler.std_, b.scaler.std_)
    assert a.feature_names == b.feature_names and a.env_names == b.env_names
    for field in ("X", "y", "env", "station", "origin"):
        left, right = getattr(a.train, field), getattr(b.train, field)
        assert left.shape == right.shape
        if left.dtype == object:
            assert list(left) == list(right)
        else:
            assert left.tobytes() == right.tobytes()  # bitwise


@pytest.mark.parametrize("cities, block", [
    ((TARGET,), "test"), ((TARGET,), "val"), (SOURCES, "val"), (SOURCES, "test"),
    ((TARGET,), "train"),  # target_train_fraction == 0: the target's train block is not training data
    (SOURCES + (TARGET,), "gap"),
])
def test_planting_outside_source_train_changes_nothing_learned(cities, block):
    split, data = record(), tables()
    before = build_windows(split, data, CONFIG)
    after = build_windows(split, plant(data, cities, *span(split, block)), CONFIG)
    assert_same(before, after)
    if block in ("val", "test", "gap"):
        # the MASE scale comes from the target's train block only
        assert after.target_naive_scales == before.target_naive_scales
    if cities == (TARGET,) and block == "test":
        for name in ("val_target", "val_source", "test_source"):
            assert getattr(after, name).X.tobytes() == getattr(before, name).X.tobytes()


def test_admitted_target_fraction_only_exposes_its_own_hours():
    split, data = record(fraction=0.25), tables()
    before = build_windows(split, data, CONFIG)
    assert np.any(before.train.env == before.env_names.index(f"{TARGET}-admitted"))
    after = build_windows(split, plant(data, (TARGET,), *span(split, "train_before_admitted")), CONFIG)
    assert_same(before, after)
    tested = build_windows(split, plant(data, (TARGET,), *span(split, "test")), CONFIG)
    assert_same(before, tested)


def test_a_feature_delivered_only_in_the_target_test_block_stays_dropped():
    data = tables()
    data[TARGET] = with_qc(data[TARGET].assign(so2=np.nan))
    split = record()
    before = build_windows(split, data, CONFIG)
    start, end = span(split, "test")
    revealed = data[TARGET].copy()
    revealed.loc[(revealed["time"] >= start) & (revealed["time"] < end), "so2"] = 5.0
    after = build_windows(split, {**data, TARGET: with_qc(revealed)}, CONFIG)
    assert "so2" in before.dropped_features and after.dropped_features == before.dropped_features
    assert_same(before, after)


def test_positive_control_planting_in_source_train_is_detected():
    split, data = record(), tables()
    before = build_windows(split, data, CONFIG)
    after = build_windows(split, plant(data, SOURCES, *span(split, "train")), CONFIG)
    with pytest.raises(AssertionError):
        assert_same(before, after)
    assert not np.array_equal(before.scaler.mean_, after.scaler.mean_)
