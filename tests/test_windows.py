"""Forecast windows: shapes, values checkable by index, missing-value rules, blocks, features, scaling."""

import numpy as np
import pandas as pd
import pytest

from pipeline.errors import InputError
from pipeline.splits import admitted_target_block, compute_time_blocks, plan_splits
from pipeline.windows import ForecastConfig, build_windows, non_overlapping_targets
from synthetic_clean import START, clean_table, station_table, with_qc

L, H, HOURS = 12, 6, 400
HOUR = pd.Timedelta(hours=1)
LAYOUT = {"avel": [("avel_a", 0.0, 0.0), ("avel_b", 0.0, 0.3)], "brum": [("brum_a", 5.0, 5.0)],
          "cosk": [("cosk_a", 9.0, 9.0), ("cosk_b", 9.0, 9.5)]}
STATIONS = station_table(LAYOUT)
SETS = ("train", "val_source", "test_source", "val_target", "test_target")
SET_BLOCK = {"train": "train", "val_source": "val", "val_target": "val", "test_source": "test",
             "test_target": "test"}


def make_tables(**missing):
    """{city: clean table}; missing={city: [variables not delivered]}."""
    return {city: clean_table([s for s, _, _ in rows], HOURS, seed=i, missing=missing.get(city, ()))
            for i, (city, rows) in enumerate(LAYOUT.items())}


def make_record(target="cosk", **split_settings):
    settings = {"schemes": ["loco"], **split_settings}
    item = next(i for i in plan_splits(settings, STATIONS, L, H) if i["target"] == target)
    blocks = compute_time_blocks(START, START + HOURS * HOUR, item["blocks"], item["gap_hours"], L + H)
    return {**item, "time_blocks": blocks,
            "admitted_target_block": admitted_target_block(blocks, item["target_train_fraction"])}


def config(**changes):
    return ForecastConfig(**{"lookback_hours": L, "horizon_hours": H, **changes})


def block_hours(record, name):
    start, end = (pd.Timestamp(t) for t in record["time_blocks"][name])
    return int((start - START) / HOUR), int((end - START) / HOUR)


def origin_hours(window_set):
    return ((window_set.origin - np.datetime64(START.tz_localize(None), "ns")) // np.timedelta64(1, "h")).astype(int)


def test_shapes_dtypes_and_feature_list():
    windows = build_windows(make_record(), make_tables(), config())
    names = windows.feature_names
    assert names[windows.target_index] == "pm25"
    assert "wind_dir_deg" not in names and {"wind_dir_sin", "wind_dir_cos"} <= set(names)
    assert names[-6:] == ["hour_sin", "hour_cos", "dow_sin", "dow_cos", "doy_sin", "doy_cos"]
    for name in SETS:
        ws = getattr(windows, name)
        n = len(ws)
        assert n > 0
        assert ws.X.shape == (n, L, len(names)) and ws.X.dtype == np.float32
        assert ws.y.shape == (n, H) and ws.y.dtype == np.float32
        assert ws.env.dtype == np.int64 and ws.station.dtype == object and ws.origin.dtype == "datetime64[ns]"
        assert ws.feature_names == names and ws.env_names == windows.env_names
    no_calendar = build_windows(make_record(), make_tables(), config(calendar=False))
    assert no_calendar.feature_names == names[:-6]


def test_values_are_checkable_by_index():
    tables = make_tables()
    windows = build_windows(make_record(), tables, config())
    number = {s: k for rows in LAYOUT.values() for k, (s, _, _) in enumerate(rows)}
    names = windows.feature_names
    for name in SETS:
        ws = getattr(windows, name)
        end = origin_hours(ws)
        offset = np.array([1000.0 * (number[s] + 1) for s in ws.station])
        # synthetic pm25 = 1000 * (station number + 1) + hour index
        expected_inputs = offset[:, None] + end[:, None] + np.arange(-L + 1, 1)
        expected_targets = offset[:, None] + end[:, None] + np.arange(1, H + 1)
        assert np.allclose(windows.unscale_target(ws.X[:, :, windows.target_index]), expected_inputs, rtol=1e-6)
        assert np.allclose(windows.unscale_target(ws.y), expected_targets, rtol=1e-6)
    # one window looked up by hand in the table: temperature, wind direction as sin/cos, UTC hour
    ws = windows.test_target
    i = len(ws) // 2
    station, last = ws.station[i], origin_hours(ws)[i]
    city = "cosk"
    rows = tables[city][tables[city]["station_id"] == station].set_index("time")
    hours = [START + (last - L + 1 + k) * HOUR for k in range(L)]
    unscaled = {f: windows.scaler.unscale(ws.X[i, :, names.index(f)], f) for f in names}
    assert np.allclose(unscaled["temp_c"], rows.loc[hours, "temp_c"], rtol=1e-5)
    assert np.allclose(unscaled["wind_dir_sin"], np.sin(np.radians(rows.loc[hours, "wind_dir_deg"])), atol=1e-5)
    assert np.allclose(unscaled["wind_dir_cos"], np.cos(np.radians(rows.loc[hours, "wind_dir_deg"])), atol=1e-5)
    assert np.allclose(unscaled["hour_sin"], np.sin(2 * np.pi * np.array([h.hour for h in hours]) / 24), atol=1e-5)


def test_counts_and_stride():
    record = make_record()
    windows = build_windows(record, make_tables(), config())
    start, end = block_hours(record, "train")
    per_station = end - start - L - H + 1
    assert len(windows.train) == 3 * per_station  # avel_a, avel_b, brum_a
    strided = build_windows(record, make_tables(), config(stride_hours=5))
    assert len(strided.train) == 3 * ((end - start - L - H) // 5 + 1)
    first = strided.train.station == "avel_a"
    assert set(np.diff(origin_hours(strided.train)[first])) == {5}
    assert origin_hours(strided.train)[first][0] == start + L - 1  # stride counted from the block start


def test_no_window_crosses_a_block_boundary():
    record = make_record(target_train_fraction=0.2)
    windows = build_windows(record, make_tables(), config(stride_hours=2))
    for name in SETS:
        start, end = block_hours(record, SET_BLOCK[name])
        last = origin_hours(getattr(windows, name))
        assert np.all(last - L + 1 >= start) and np.all(last + H <= end - 1)
    admitted = windows.train.env == windows.env_names.index("cosk-admitted")
    assert admitted.any()
    start = int((pd.Timestamp(record["admitted_target_block"][0]) - START) / HOUR)
    assert np.all(origin_hours(windows.train)[admitted] - L + 1 >= start)
    assert set(windows.train.station[admitted]) == {"cosk_a", "cosk_b"}


def plant_nan(tables, city, station, variable, hours):
    table = tables[city].copy()
    rows = (table["station_id"] == station) & table["time"].isin([START + h * HOUR for h in hours])
    table.loc[rows, variable] = np.nan
    tables[city] = with_qc(table)
    return tables


def test_skip_counts_on_planted_nans():
    record = make_record()
    clean = build_windows(record, make_tables(), config(fill_limit_hours=0))
    assert clean.skipped == {"input_missing": 0, "target_missing": 0}
    tables = plant_nan(make_tables(), "avel", "avel_a", "pm25", [100])  # hour 100: inside train
    no_fill = build_windows(record, tables, config(fill_limit_hours=0))
    # the NaN hour is an input of L windows and a target hour of H other windows
    assert no_fill.skipped == {"input_missing": L, "target_missing": H}
    assert len(no_fill.train) == len(clean.train) - L - H
    filled = build_windows(record, tables, config(fill_limit_hours=3))
    assert filled.skipped == {"input_missing": 0, "target_missing": H}  # targets are never filled
    tables = plant_nan(make_tables(), "brum", "brum_a", "temp_c", [100])
    assert build_windows(record, tables, config(fill_limit_hours=0)).skipped == {"input_missing": L,
                                                                                 "target_missing": 0}


def test_fill_limit_carries_the_last_value_for_at_most_the_limit():
    record = make_record()
    tables = plant_nan(make_tables(), "brum", "brum_a", "temp_c", [100, 101, 102, 103])
    limited = build_windows(record, tables, config(fill_limit_hours=3))
    assert limited.skipped == {"input_missing": L, "target_missing": 0}  # only hour 103 stays missing
    assert build_windows(record, tables, config(fill_limit_hours=4)).skipped["input_missing"] == 0
    ws = limited.train
    i = np.flatnonzero((ws.station == "brum_a") & (origin_hours(ws) == 102))[0]
    temp = limited.scaler.unscale(ws.X[i, :, limited.feature_names.index("temp_c")], "temp_c")
    brum = tables["brum"].set_index("time")["temp_c"]
    assert np.allclose(temp[-3:], brum[START + 99 * HOUR], rtol=1e-6)  # hours 100-102 carry hour 99


def test_variables_not_delivered_are_dropped_with_a_reason():
    tables = make_tables(brum=["so2"], cosk=["aux"])
    windows = build_windows(make_record(), tables, config(exclude_features=["co"]))
    assert windows.dropped_features == {"so2": "not delivered by source city brum in the train block",
                                        "aux": "not delivered by target cosk in the train block",
                                        "co": "excluded by forecast.exclude_features"}
    assert not {"so2", "aux", "co"} & set(windows.feature_names)
    assert np.sum(windows.train.station == "brum_a") > 0  # brum still contributes windows
    with pytest.raises(InputError, match="target 'pm25' not delivered by target cosk"):
        build_windows(make_record(), make_tables(cosk=["pm25"]), config())
    with pytest.raises(InputError, match="forecast.exclude_features"):
        build_windows(make_record(), make_tables(), config(exclude_features=["pm25"]))


@pytest.mark.parametrize("unit", ["city", "station"])
def test_environment_indices(unit):
    record = make_record(environment=unit)
    windows = build_windows(record, make_tables(), config())
    names = windows.env_names
    assert names == list(record["environments"]) + list(record["target_environments"])
    for name in SETS:
        ws = getattr(windows, name)
        mapping = record["target_environments"] if name.endswith("target") else record["environments"]
        for station, env in zip(ws.station, ws.env):
            assert station in mapping[names[env]]


def test_scaler_is_fitted_on_source_train_rows_and_floors_the_std():
    record = make_record()
    tables = make_tables()
    tables["brum"]["precip_mm"] = 0.0  # constant feature
    windows = build_windows(record, tables, config())
    start, end = block_hours(record, "train")
    hours = [START + h * HOUR for h in range(start, end)]
    rows = pd.concat([tables[c][tables[c]["time"].isin(hours)] for c in ("avel", "brum")])
    k = windows.feature_names.index("pm25")
    assert windows.scaler.mean_[k] == pytest.approx(rows["pm25"].mean(), rel=1e-12)
    assert windows.scaler.std_[k] == pytest.approx(rows["pm25"].std(ddof=0), rel=1e-12)
    tables["avel"]["precip_mm"] = 0.0
    constant = build_windows(record, tables, config())
    # scikit-learn's StandardScaler gives a zero-variance feature the scale 1 (sklearn.preprocessing docs)
    assert constant.scaler.std_[constant.feature_names.index("precip_mm")] == 1.0


def test_target_naive_scales_are_per_station_over_the_target_train_block():
    record = make_record()
    tables = make_tables()
    scales = build_windows(record, tables, config()).target_naive_scales
    assert set(scales) == set(record["target_stations"]) and set(scales.values()) == {24.0}  # +1 per hour
    rng = np.random.default_rng(5)
    tables["cosk"]["pm25"] = rng.gamma(2.0, 10.0, len(tables["cosk"]))
    start, end = block_hours(record, "train")
    expected = {}
    for station, rows in tables["cosk"].groupby("station_id"):
        y = rows.set_index("time")["pm25"].iloc[start:end]
        expected[station] = (y - y.shift(24)).abs().dropna().mean()  # Hyndman & Koehler (2006), m = 24 h
    assert build_windows(record, tables, config()).target_naive_scales == pytest.approx(expected, rel=1e-12)


def test_config_checks():
    record = make_record()
    assert len(build_windows(record, make_tables(), {"lookback_hours": L, "horizon_hours": H}).train) > 0
    with pytest.raises(InputError, match="forecast.lookbak"):
        build_windows(record, make_tables(), {"lookbak": 3})
    with pytest.raises(InputError, match="gap 18 h < lookback \\+ horizon = 30 h"):
        build_windows(record, make_tables(), config(horizon_hours=18))
    with pytest.raises(InputError, match="forecast.target"):
        build_windows(record, make_tables(), config(target="pm1"))


def hand_windows(stations, hours):
    """A WindowSet-like object with only the fields the thinning reads: station and origin (hours from START)."""
    origin = np.array([np.datetime64(START.tz_localize(None), "ns") + np.timedelta64(h, "h") for h in hours])
    return type("Hand", (), {"station": np.array(stations, dtype=object), "origin": origin,
                             "y": np.zeros((len(hours), 1))})()


def test_thinning_keeps_per_station_the_first_window_and_then_one_per_horizon():
    # Rows out of origin order and interleaved stations: a at hours 0, 3, ..., 21 (stride 3), plus an
    # irregular b; horizon 6 h.
    stations = ["a", "b", "a", "a", "b", "a", "b", "a", "a", "b", "a", "a"]
    hours = [9, 10, 0, 3, 2, 6, 7, 12, 15, 13, 18, 21]
    keep = non_overlapping_targets(hand_windows(stations, hours), horizon_hours=6)
    kept = {s: sorted(h for s2, h, k in zip(stations, hours, keep) if k and s2 == s) for s in "ab"}
    assert kept == {"a": [0, 6, 12, 18], "b": [2, 10]}  # b: 7 is 5 h after 2 (dropped), 13 is 3 h after 10


def test_thinned_windows_never_share_a_target_hour_and_every_station_keeps_its_first():
    record = make_record()
    windows = build_windows(record, make_tables(), config(stride_hours=2))
    for name in ("val_source", "val_target"):
        window_set = getattr(windows, name)
        keep = non_overlapping_targets(window_set, H)
        assert 0 < keep.sum() < len(keep)
        for station in set(window_set.station):
            mine = window_set.station == station
            kept_hours = np.sort(origin_hours(window_set)[mine & keep])
            assert kept_hours[0] == origin_hours(window_set)[mine].min()  # the first window is kept
            assert np.all(np.diff(kept_hours) >= H)  # targets (origin + 1 .. origin + H) never overlap
            # greedy: every dropped window is less than one horizon after the last kept one before it
            for hour in origin_hours(window_set)[mine & ~keep]:
                assert hour - kept_hours[kept_hours <= hour].max() < H
    assert not non_overlapping_targets(windows.val_source, H).all()
    assert non_overlapping_targets(windows.val_source, 1).all()  # stride >= horizon: nothing overlaps
