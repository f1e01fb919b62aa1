"""Ingestion aligns each delivery to the study's cadence: 10 min, 15 min, hourly, daily."""

import numpy as np
import pandas as pd
import pytest

from pipeline.errors import InputError
from pipeline.ingest import ingest_city
from pipeline.ingest.cadence import cadence_label, parse_cadence
from pipeline.stations import load_stations
from pipeline.variables import QC_INCOMPLETE, QC_MISSING, QC_OK

START = pd.Timestamp("2025-03-01T00:00Z")


def deliver(tmp_path, step: str, periods: int, drop=()):
    """A wide CSV of one station: pm25 = index of the delivered step (0, 1, 2, ...); `drop` leaves rows out."""
    times = pd.date_range(START, periods=periods, freq=step)
    table = pd.DataFrame({"site": "A1", "time": times.strftime("%Y-%m-%dT%H:%M:%SZ"),
                          "pm": np.arange(periods, dtype=float)}).drop(index=list(drop))
    (tmp_path / "raw" / "town").mkdir(parents=True, exist_ok=True)
    table.to_csv(tmp_path / "raw" / "town" / "dump.csv", index=False)
    (tmp_path / "stations.csv").write_text("station_id,city,lat,lon,elevation_m,site_type\n"
                                           "a1,town,50.0,8.0,100,urban_background\n")
    return load_stations(tmp_path / "stations.csv")


def ingest(tmp_path, stations, cadence, **extra):
    fmt = {"layout": "wide_csv", "files": "town/*.csv", "station_column": "site", "station_map": {"A1": "a1"},
           "time": {"column": "time", "format": "iso8601"}, "columns": {"pm": "pm25"},
           "units": {"pm25": "ug/m3"}, "cadence": cadence, **extra}
    return ingest_city("town", fmt, tmp_path / "raw", stations, config_file="data.yaml")


@pytest.mark.parametrize("step, periods", [("10min", 30), ("15min", 20), ("1h", 30), ("1D", 10)])
def test_a_delivery_at_the_study_cadence_is_kept_as_delivered(tmp_path, step, periods):
    stations = deliver(tmp_path, step, periods, drop=[3])
    clean, report = ingest(tmp_path, stations, step)
    assert report["cadence"] == {"study": cadence_label(pd.Timedelta(step)),
                                 "delivered": cadence_label(pd.Timedelta(step)), "aggregation": None}
    assert len(clean) == periods and (clean["time"].diff().dropna() == pd.Timedelta(step)).all()
    assert clean["pm25_qc"].iloc[3] == QC_MISSING and clean["pm25"].iloc[4] == 4.0
    gaps = report["gaps"]["a1"]
    assert gaps["gap_count"] == 1 and ("missing_hours" if step == "1h" else "missing_steps") in gaps


def test_ten_minute_readings_become_hourly_means_when_75_percent_are_present(tmp_path):
    # hour 0 complete (0..5), hour 1 misses 1 of 6 (5/6 >= 75 %), hour 2 misses 2 of 6 (4/6 < 75 %)
    stations = deliver(tmp_path, "10min", 18, drop=[8, 13, 14])
    clean, report = ingest(tmp_path, stations, "1h")
    assert list(clean["time"]) == list(pd.date_range(START, periods=3, freq="h"))
    assert clean["pm25"].iloc[0] == pytest.approx(np.mean(range(6)))
    assert clean["pm25"].iloc[1] == pytest.approx(np.mean([6, 7, 9, 10, 11]))
    assert np.isnan(clean["pm25"].iloc[2]) and clean["pm25_qc"].iloc[2] == QC_INCOMPLETE
    aggregation = report["cadence"]["aggregation"]
    assert aggregation["values_per_step"] == 6 and aggregation["valid_values_needed"] == 5
    assert aggregation["by_variable"]["pm25"] == {"steps_complete": 2, "steps_incomplete": 1}
    assert report["values"]["pm25"]["incomplete"] == 1 and report["cadence"]["delivered"] == "10min"


def test_hourly_values_become_daily_means_with_18_of_24_hours(tmp_path):
    # Common practice in air-quality reporting: a daily mean needs 75 % of the hours, 18 of 24
    # (EU Directive 2008/50/EC, Annex XI [from memory]).
    day2_missing = list(range(24, 30))  # 6 hours missing: 18 left, enough
    day3_missing = list(range(48, 55))  # 7 hours missing: 17 left, not enough
    stations = deliver(tmp_path, "1h", 72, drop=day2_missing + day3_missing)
    clean, report = ingest(tmp_path, stations, "1d")
    assert list(clean["pm25_qc"]) == [QC_OK, QC_OK, QC_INCOMPLETE]
    assert clean["pm25"].iloc[1] == pytest.approx(np.mean(range(30, 48)))
    assert report["cadence"]["aggregation"]["valid_values_needed"] == 18
    assert "18 of 24 (75%)" in report["cadence"]["aggregation"]["rule"]


def test_fifteen_minute_readings_become_hourly_with_a_declared_completeness(tmp_path):
    stations = deliver(tmp_path, "15min", 8, drop=[1, 2])  # hour 0 keeps 2 of 4 values
    clean, _ = ingest(tmp_path, stations, "1h", completeness=0.5)
    assert clean["pm25"].iloc[0] == pytest.approx(np.mean([0, 3])) and clean["pm25_qc"].iloc[0] == QC_OK


def test_a_finer_cadence_than_delivered_is_one_line_naming_the_field(tmp_path):
    stations = deliver(tmp_path, "1h", 10)
    with pytest.raises(InputError) as caught:
        ingest(tmp_path, stations, "15min")
    message = str(caught.value)
    assert "\n" not in message and "data.yaml" in message and "cities.town.cadence" in message
    assert "finer than the delivery's step 1h" in message


@pytest.mark.parametrize("text", ["7min", "5h", "2d", "0s", "hourly"])
def test_a_cadence_that_does_not_divide_a_day_is_refused(text):
    with pytest.raises(InputError, match="is not a cadence"):
        parse_cadence(text, "data.yaml", "cities.town.cadence")
