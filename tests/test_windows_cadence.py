"""Windows at every cadence (10 min, 15 min, hourly, daily): lengths in hours, cut in steps of the cadence."""

import numpy as np
import pandas as pd
import pytest

from pipeline.errors import InputError
from pipeline.models import build_model
from pipeline.splits import compute_time_blocks, plan_splits
from pipeline.windows import build_windows
from synthetic_clean import START, clean_table, station_table

LAYOUT = {"avel": [("avel_a", 0.0, 0.0)], "brum": [("brum_a", 5.0, 5.0)], "cosk": [("cosk_a", 9.0, 9.0)]}
STATIONS = station_table(LAYOUT)
STEPS = 400
# cadence -> (lookback, horizon, stride) in hours: whole numbers of steps at that cadence
CADENCES = {"10min": (2, 1, 1), "15min": (3, 1, 2), "1h": (12, 6, 1), "1D": (96, 48, 24)}


def tables_at(step: str, steps: int = STEPS, cities=LAYOUT) -> dict:
    """Clean tables whose pm25 is 1000 * (station number + 1) + the index of the step."""
    tables = {}
    for seed, (city, rows) in enumerate(cities.items()):
        table = clean_table([s for s, _, _ in rows], steps, seed=seed)
        table["time"] = pd.date_range(START, periods=steps, freq=step).repeat(len(rows)).to_numpy()
        tables[city] = table.sort_values(["station_id", "time"], ignore_index=True)
    return tables


def record_for(lookback: int, horizon: int, end: pd.Timestamp) -> dict:
    item = next(i for i in plan_splits({"schemes": ["loco"]}, STATIONS, lookback, horizon) if i["target"] == "cosk")
    blocks = compute_time_blocks(START, end, item["blocks"], item["gap_hours"], lookback + horizon)
    return {**item, "time_blocks": blocks, "admitted_target_block": None}


@pytest.mark.parametrize("step", list(CADENCES))
def test_lengths_in_hours_become_steps_of_the_cadence(step):
    lookback, horizon, stride = CADENCES[step]
    per_hour = pd.Timedelta(hours=1) / pd.Timedelta(step)
    record = record_for(lookback, horizon, START + STEPS * pd.Timedelta(step))
    windows = build_windows(record, tables_at(step), {"lookback_hours": lookback, "horizon_hours": horizon,
                                                      "stride_hours": stride, "fill_limit_hours": 0})
    assert windows.step_hours == pytest.approx(1 / per_hour)
    assert windows.train.X.shape[1] == round(lookback * per_hour)
    assert windows.train.y.shape[1] == round(horizon * per_hour)
    # consecutive rows of a window are consecutive steps: pm25 (the step's index) grows by one per row
    pm25 = windows.unscale_target(windows.train.X[:, :, windows.target_index])
    assert np.allclose(np.diff(pm25, axis=1), 1.0, atol=1e-2)
    origins = pd.DatetimeIndex(windows.train.origin[windows.train.station == "avel_a"])
    assert (origins.to_series().diff().dropna() == pd.Timedelta(hours=stride)).all()
    # MASE scale: the seasonal naive error over one day (24 h; one step for daily data) of a series that
    # grows by one per step is the number of steps in the season
    season_steps = max(round(24 * per_hour), 1)
    assert windows.target_naive_scales["cosk_a"] == pytest.approx(season_steps)


def test_a_length_that_is_not_whole_steps_names_its_key():
    record = record_for(36, 48, START + STEPS * pd.Timedelta(days=1))
    with pytest.raises(InputError, match="forecast.lookback_hours: 36 h is not a whole number"):
        build_windows(record, tables_at("1D"), {"lookback_hours": 36, "horizon_hours": 48, "stride_hours": 24})


def test_cities_on_different_cadences_are_refused():
    tables = tables_at("1h")
    tables["brum"] = tables_at("15min", cities={"brum": LAYOUT["brum"]})["brum"]
    with pytest.raises(InputError, match="different cadences"):
        build_windows(record_for(12, 6, START + STEPS * pd.Timedelta(hours=1)), tables,
                      {"lookback_hours": 12, "horizon_hours": 6})


@pytest.mark.parametrize("step, season_hours, steps_back", [("1h", 24, 24), ("10min", 1, 6), ("1D", 168, 7)])
def test_seasonal_naive_looks_back_one_season_in_steps(step, season_hours, steps_back):
    lookback, horizon, stride = {"1h": (24, 6, 1), "10min": (2, 1, 1), "1D": (192, 48, 24)}[step]
    record = record_for(lookback, horizon, START + STEPS * pd.Timedelta(step))
    windows = build_windows(record, tables_at(step), {"lookback_hours": lookback, "horizon_hours": horizon,
                                                      "stride_hours": stride, "fill_limit_hours": 0})
    model = build_model("seasonal_naive", {"season_hours": season_hours}, seed=0).fit(windows.train)
    forecast = windows.unscale_target(model.predict(windows.test_target.X))
    truth = windows.unscale_target(windows.test_target.y)
    # pm25 grows by one per step, so a forecast one season back is low by exactly the season in steps
    assert np.allclose(truth[:, 0] - forecast[:, 0], steps_back, atol=1e-2)
