"""QC counts with exact expected values on small crafted dumps, and the atomic writes of run_ingest."""

import json
import shutil
from pathlib import Path

import pandas as pd
import pytest

from pipeline.ingest import ingest_city, run_ingest
from pipeline.stations import load_stations
from pipeline.variables import QC_MISSING, QC_OUT_OF_RANGE, QC_SENTINEL, QC_UNPARSEABLE

DATA = Path(__file__).parent / "data"
STATIONS = load_stations(DATA / "stations_small.csv")
WIDE = {"layout": "wide_csv", "files": "tinytown/*.csv", "station_column": "site",
        "station_map": {"S1": "s1"},
        "time": {"column": "local_time", "format": "%Y-%m-%d %H:%M", "timezone": "CET"},
        "columns": {"PM2.5": "pm25", "NO2": "no2", "RH": "rh_pct", "temp": "temp_c"},
        "units": {"pm25": "ug/m3", "no2": "ppb", "rh_pct": "%", "temp_c": "degC"}, "sentinels": [-999]}


def ingest(tmp_path, fixture, **changes):
    folder = tmp_path / "raw" / "tinytown"
    folder.mkdir(parents=True, exist_ok=True)
    shutil.copy(DATA / fixture, folder / fixture)
    return ingest_city("tinytown", {**WIDE, **changes}, tmp_path / "raw", STATIONS)


def at(clean, iso):
    return clean.set_index("time").loc[pd.Timestamp(iso)]


def test_autumn_dump_counts_every_row_once(tmp_path):
    clean, qc = ingest(tmp_path, "wide_dst.csv")
    rows = qc["rows"]
    # 12 data rows (1 blank line skipped): S9 unknown, "garbage" time, one exact copy of the 03:00 row,
    # the first 04:00 row loses to the later one, 09:30 is not on the hour.
    assert (rows["read"], rows["kept"], rows["dropped"]) == (12, 7, 5)
    assert {k: v for k, v in rows["dropped_by_reason"].items() if v} == {
        "unknown_station": 1, "unparseable_timestamp": 1, "exact_duplicate": 1,
        "timestamp_off_the_step": 1, "conflicting_duplicate": 1}
    assert qc["duplicates"]["conflicting_keys"] == 1 and qc["unknown_station_codes"] == {"S9": 1}
    assert qc["files"][0]["blank_lines"] == 1


def test_autumn_repeated_hour_is_paired_in_delivery_order(tmp_path):
    clean, qc = ingest(tmp_path, "wide_dst.csv")
    dst = qc["dst"]
    assert (dst["ambiguous_rows"], dst["ambiguous_assigned_summer_time"],
            dst["ambiguous_assigned_standard_time"], dst["ambiguous_lone_rows"]) == (2, 1, 1, 0)
    # 02:00 CEST = 00:00 UTC (first row, pm25 12), 02:00 CET = 01:00 UTC (second row, pm25 13).
    assert at(clean, "2025-10-26T00:00Z")["pm25"] == 12 and at(clean, "2025-10-26T01:00Z")["pm25"] == 13


def test_value_flags_and_gaps(tmp_path):
    clean, qc = ingest(tmp_path, "wide_dst.csv")
    assert at(clean, "2025-10-26T02:00Z")["pm25_qc"] == QC_SENTINEL
    kept_0400 = at(clean, "2025-10-26T03:00Z")  # 04:00 CET: keep_last kept "7,25,60"
    assert (kept_0400["pm25"], kept_0400["rh_pct"]) == (7, 60)
    assert at(clean, "2025-10-26T07:00Z")["no2_qc"] == QC_MISSING  # empty cell
    values = qc["values"]
    assert values["pm25"] == {"ok": 6, "missing": 3, "sentinel": 1, "out_of_range": 0, "unparseable": 0,
                              "incomplete": 0}
    # Grid 2025-10-25 22:00 .. 2025-10-26 07:00 UTC = 10 hours, 7 delivered, 04:00-06:00 UTC missing.
    assert qc["gaps"]["s1"] == {"first": "2025-10-25T22:00:00+00:00", "last": "2025-10-26T07:00:00+00:00",
                                "hours_on_grid": 10, "hours_with_data": 7, "missing_hours": 3,
                                "gap_count": 1, "longest_gap_hours": 3,
                                "longest_gap_start": "2025-10-26T04:00:00+00:00"}
    assert len(clean) == 10 and qc["stations_without_data"] == ["s2"]


def test_out_of_range_and_unparseable_when_the_first_row_wins(tmp_path):
    clean, qc = ingest(tmp_path, "wide_dst.csv", duplicates="keep_first")
    row = at(clean, "2025-10-26T03:00Z")  # the "-5,x,130" row now survives
    assert (row["pm25_qc"], row["no2_qc"], row["rh_pct_qc"]) == (QC_OUT_OF_RANGE, QC_UNPARSEABLE,
                                                                QC_OUT_OF_RANGE)
    assert pd.isna(row["pm25"]) and pd.isna(row["rh_pct"])
    assert qc["values"]["rh_pct"]["out_of_range"] == 1 and qc["values"]["no2"]["unparseable"] == 1
    assert "first row" in qc["duplicates"]["resolution"]


def test_spring_skipped_hour_is_dropped_and_counted(tmp_path):
    clean, qc = ingest(tmp_path, "wide_spring.csv")
    assert qc["rows"]["dropped_by_reason"]["nonexistent_local_time"] == 1
    assert qc["dst"]["nonexistent_rows_dropped"] == 1 and qc["rows"]["kept"] == 3
    # 00:00 CET, 01:00 CET, 03:00 CEST -> 23:00, 00:00, 01:00 UTC: consecutive, no gap.
    assert list(clean["time"].astype(str)) == ["2025-03-29 23:00:00+00:00", "2025-03-30 00:00:00+00:00",
                                               "2025-03-30 01:00:00+00:00"]


@pytest.mark.parametrize("policy, summer, standard, dropped", [("dst", 2, 0, 0), ("standard", 0, 2, 0),
                                                               ("drop", 0, 0, 2)])
def test_other_ambiguous_policies(tmp_path, policy, summer, standard, dropped):
    _, qc = ingest(tmp_path, "wide_dst.csv", time={**WIDE["time"], "ambiguous": policy})
    dst = qc["dst"]
    assert (dst["ambiguous_assigned_summer_time"], dst["ambiguous_assigned_standard_time"],
            dst["ambiguous_rows_dropped"]) == (summer, standard, dropped)
    assert qc["rows"]["dropped_by_reason"]["ambiguous_local_time"] == dropped


def test_run_ingest_writes_parquet_and_json_atomically(tmp_path):
    folder = tmp_path / "raw" / "tinytown"
    folder.mkdir(parents=True)
    shutil.copy(DATA / "wide_dst.csv", folder)
    out_parquet, out_qc = tmp_path / "clean" / "tinytown.parquet", tmp_path / "qc" / "tinytown.json"
    qc = run_ingest("tinytown", WIDE, tmp_path / "raw", DATA / "stations_small.csv", out_parquet, out_qc,
                    20.0)
    stored = json.loads(out_qc.read_text())
    assert stored["rows"] == qc["rows"] and stored["reference_temperature_c"] == 20.0
    assert stored["conversions"]["no2"][0]["reference_temperature_c"] == 20.0
    table = pd.read_parquet(out_parquet)
    assert len(table) == 10 and str(table["time"].dtype) == "datetime64[ns, UTC]"
    leftovers = [p.name for p in (tmp_path / "clean").iterdir()] + [p.name for p in (tmp_path / "qc").iterdir()]
    assert sorted(leftovers) == ["tinytown.json", "tinytown.parquet"]  # no temporary files left
