"""Every layout's reader on tiny fixture files (tests/data), plus the bad-input errors."""

import math
import shutil
from pathlib import Path

import pandas as pd
import pytest

from pipeline.errors import InputError
from pipeline.ingest import ingest_city
from pipeline.ingest.formats import validate_format
from pipeline.stations import load_stations
from pipeline.variables import QC_MISSING, QC_OK, QC_SENTINEL, QC_UNPARSEABLE

DATA = Path(__file__).parent / "data"
STATIONS = load_stations(DATA / "stations_small.csv")

SEMICOLON = {"layout": "wide_csv", "files": "semitown/*.csv", "separator": ";", "decimal": ",",
             "station_column": "XSK", "station_map": {"C1": "c1"},
             "time": {"column": "XTK", "format": "%d.%m.%Y %H:%M", "timezone": "Etc/GMT-1", "label": "end"},
             "columns": {"PM25": "pm25", "T7": "temp_c", "W7": "wind_speed_ms"},
             "units": {"pm25": "ug/m3", "temp_c": "degC", "wind_speed_ms": "km/h"}, "sentinels": [-99]}
LONG = {"layout": "long_csv", "files": "longtown/*.csv", "station_column": "station",
        "station_map": {"L1": "l1", "L2": "l2"},
        "time": {"column": "datetime_utc", "format": "%Y-%m-%dT%H:%M:%SZ"},
        "variable_column": "parameter", "value_column": "value", "unit_column": "unit",
        "variables": {"NO2": "no2", "CO": "co", "O3": "o3"}, "sentinels": [-9999]}
JSONL = {"layout": "jsonl", "files": "jsontown/*.jsonl", "station_column": "sid",
         "station_map": {"J1": "j1"}, "time": {"column": "ts", "format": "iso8601"},
         "columns": {"obs.pm25": "pm25", "met.t": "temp_c"}, "units": {"pm25": "ug/m3", "temp_c": "degF"}}


def raw_dir(tmp_path, city, fixture):
    folder = tmp_path / "raw" / city
    folder.mkdir(parents=True)
    shutil.copy(DATA / fixture, folder / fixture)
    return tmp_path / "raw"


def value(clean, station, iso, column):
    row = clean[(clean["station_id"] == station) & (clean["time"] == pd.Timestamp(iso))]
    assert len(row) == 1
    return row[column].iloc[0]


def test_semicolon_decimal_comma_fixed_offset_hour_ending(tmp_path):
    clean, qc = ingest_city("semitown", SEMICOLON, raw_dir(tmp_path, "semitown", "semicolon.csv"), STATIONS)
    # "01.01.2025 01:00" at UTC+1 ending the hour -> the hour starting 2024-12-31 23:00 UTC.
    assert list(clean["time"].astype(str)) == ["2024-12-31 23:00:00+00:00", "2025-01-01 00:00:00+00:00"]
    assert value(clean, "c1", "2024-12-31T23:00Z", "pm25") == 12.5
    assert value(clean, "c1", "2024-12-31T23:00Z", "temp_c") == -3.2
    assert value(clean, "c1", "2024-12-31T23:00Z", "wind_speed_ms") == pytest.approx(10.0)  # 36 km/h
    assert value(clean, "c1", "2025-01-01T00:00Z", "pm25_qc") == QC_SENTINEL
    assert math.isnan(value(clean, "c1", "2025-01-01T00:00Z", "pm25"))
    assert qc["rows"] == {**qc["rows"], "read": 2, "kept": 2, "dropped": 0}


def test_long_layout_units_per_row_duplicates_and_unmapped_codes(tmp_path):
    clean, qc = ingest_city("longtown", LONG, raw_dir(tmp_path, "longtown", "long.csv"), STATIONS)
    dropped = qc["rows"]["dropped_by_reason"]
    assert qc["rows"]["read"] == 8 and qc["rows"]["kept"] == 5
    assert dropped["exact_duplicate"] == 1 and dropped["variable_not_mapped"] == 1
    assert dropped["conflicting_duplicate"] == 1 and qc["unmapped_variable_codes"] == {"BENZ": 1}
    # common practice (24.45 L/mol): 10 ppb NO2 -> 18.818 ug/m3; 1 ppm CO -> 1.1456 mg/m3.
    assert value(clean, "l1", "2025-01-01T00:00Z", "no2") == pytest.approx(18.818, abs=1e-3)
    assert value(clean, "l1", "2025-01-01T00:00Z", "co") == pytest.approx(1.1456, abs=1e-4)
    assert value(clean, "l2", "2025-01-01T00:00Z", "no2") == 200.0   # "µg/m³" spelled out
    assert value(clean, "l2", "2025-01-01T01:00Z", "no2") == 199.0   # keep_last: the later line wins
    assert value(clean, "l2", "2025-01-01T02:00Z", "no2_qc") == QC_MISSING  # gap hour on the grid
    assert value(clean, "l2", "2025-01-01T03:00Z", "o3_qc") == QC_SENTINEL
    assert {c["from"] for c in qc["conversions"]["no2"]} == {"ppb", "ug/m3"}


def test_jsonl_offsets_nested_fields_and_truncated_line(tmp_path):
    clean, qc = ingest_city("jsontown", JSONL, raw_dir(tmp_path, "jsontown", "records.jsonl"), STATIONS)
    dropped = qc["rows"]["dropped_by_reason"]
    assert qc["rows"]["read"] == 4 and qc["rows"]["kept"] == 2
    assert dropped["unparseable_record"] == 1 and dropped["unparseable_timestamp"] == 1  # no offset
    # 01:00+01:00 and 03:00+02:00 are consecutive hours (00:00 and 01:00 UTC) across the DST change.
    assert list(clean["time"].astype(str)) == ["2025-03-30 00:00:00+00:00", "2025-03-30 01:00:00+00:00"]
    assert value(clean, "j1", "2025-03-30T00:00Z", "temp_c") == pytest.approx(10.0)   # 50 degF
    assert value(clean, "j1", "2025-03-30T01:00Z", "pm25_qc") == QC_UNPARSEABLE
    assert value(clean, "j1", "2025-03-30T01:00Z", "temp_c_qc") == QC_OK
    assert qc["files"][0]["blank_lines"] == 1


def test_clean_table_schema(tmp_path):
    clean, _ = ingest_city("semitown", SEMICOLON, raw_dir(tmp_path, "semitown", "semicolon.csv"), STATIONS)
    assert str(clean["time"].dtype) == "datetime64[ns, UTC]"
    assert clean["pm25_qc"].dtype == "int8" and clean["so2"].isna().all()
    assert (clean["so2_qc"] == QC_MISSING).all()
    assert list(clean.columns[:2]) == ["station_id", "time"]


@pytest.mark.parametrize("change, field", [
    ({"layout": "xml"}, "cities.semitown.layout"),
    ({"units": {**SEMICOLON["units"], "pm25": "bananas"}}, "cities.semitown.units.pm25"),
    ({"columns": {**SEMICOLON["columns"], "X": "benzene"}}, "cities.semitown.columns.X"),
    ({"time": {"column": "XTK", "format": "%d", "timezone": "Mars/Olympus"}}, "cities.semitown.time.timezone"),
    ({"colums": {}}, "cities.semitown.colums"),
])
def test_bad_format_config_names_the_field(tmp_path, change, field):
    with pytest.raises(InputError) as caught:
        ingest_city("semitown", {**SEMICOLON, **change}, tmp_path, STATIONS, config_file="demo.yaml")
    assert str(caught.value).startswith(f"demo.yaml: {field}: ")


def test_missing_file_and_missing_column(tmp_path):
    with pytest.raises(InputError, match="no raw file matches"):
        ingest_city("semitown", SEMICOLON, tmp_path, STATIONS)
    folder = raw_dir(tmp_path, "semitown", "semicolon.csv")
    with pytest.raises(InputError) as caught:
        ingest_city("semitown", {**SEMICOLON, "columns": {"PM10": "pm10"}, "units": {"pm10": "ug/m3"}},
                    folder, STATIONS)
    assert str(caught.value).endswith(":1: PM10: column named in the format is not in the header")


def test_unknown_unit_in_a_long_row_names_file_line_and_column(tmp_path):
    folder = raw_dir(tmp_path, "longtown", "long.csv")
    path = folder / "longtown" / "long.csv"
    path.write_text(path.read_text().replace("CO,1.0,ppm", "CO,1.0,parsecs"))
    with pytest.raises(InputError) as caught:
        ingest_city("longtown", LONG, folder, STATIONS)
    assert str(caught.value).startswith(f"{path}:4: unit: ")


def test_files_default_to_the_citys_own_folder():
    """Without `files`, a city reads every file in its own folder under raw_dir (name order)."""
    block = {"layout": "station_columns_csv", "station_columns": ["a1"], "variable": "pm25",
             "units": {"pm25": "ug/m3"}, "time": {"column": "date", "format": "%Y-%m-%d"}}
    assert validate_format("mytown", block)["files"] == "mytown/*"
    assert validate_format("mytown", {**block, "files": "x/*.csv"})["files"] == "x/*.csv"
    with pytest.raises(InputError, match="cities.mytown.files"):
        validate_format("mytown", {**block, "files": ""})
