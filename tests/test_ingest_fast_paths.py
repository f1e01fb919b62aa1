"""The fast paths of ingestion (pyarrow's CSV reader, Arrow number casts, per-distinct time parsing) give
exactly what the careful per-cell paths give, and step aside for input they cannot vouch for."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from pipeline.demo import generate_demo
from pipeline.ingest import core, raw, timeparse
from pipeline.ingest.formats import validate_format
from pipeline.ingest.values import _parse_cells, parse_number_columns, parse_numbers
from pipeline.provenance import file_digest
from pipeline.stations import load_stations

REPO = Path(__file__).resolve().parents[1]
DEMO = yaml.safe_load((REPO / "config" / "data" / "demo.yaml").read_text())
STATIONS = load_stations(REPO / "config" / "stations.csv")


@pytest.mark.parametrize("city", ["arlenvik", "corvessa", "brumeholt"])
def test_fast_and_careful_ingestion_agree_on_a_demo_city(tmp_path, monkeypatch, city):
    # The demo writes every defect the ingestion handles (sentinels, ERR cells, duplicates, DST hours).
    generate_demo(tmp_path, STATIONS, {city: DEMO["cities"][city]}, "2025-03-20", 20, seed=3)
    read_fast = []
    plain_table = raw._plain_table
    monkeypatch.setattr(raw, "_plain_table", lambda *args: read_fast.append(plain_table(*args)) or read_fast[-1])
    fast_clean, fast_report = core.ingest_city(city, DEMO["cities"][city], tmp_path, STATIONS)
    assert read_fast and all(table is not None for table in read_fast)  # every demo file is plain
    monkeypatch.setattr(raw, "_plain_table", lambda *args: None)
    monkeypatch.setattr(core, "parse_numbers", _parse_cells)
    monkeypatch.setattr(core, "parse_number_columns",
                        lambda columns, spec: {name: _parse_cells(text, spec) for name, text in columns.items()})
    careful_clean, careful_report = core.ingest_city(city, DEMO["cities"][city], tmp_path, STATIONS)
    pd.testing.assert_frame_equal(fast_clean, careful_clean, check_exact=True)
    assert fast_report == careful_report
    assert fast_report["rows"]["dropped_by_reason"]["exact_duplicate"] > 0


@pytest.mark.parametrize("decimal", [".", ","])
def test_arrow_numbers_match_the_per_cell_rules(decimal):
    cells = ["1.5", "-0.25", "1e3", "+2", ".5", "5.", "", "NA", "na", " NA", " 7 ", "nan", "NaN", "inf",
             "-Infinity", "1e400", "ERR", "1,5", "1.5.3", "-999", "-999.0", "0x10", "1_0", "١٢", "-", "None"]
    spec = {"missing_values": ["", "NA", "N/A", "#N/A", "NaN", "null", "None", "-"], "decimal": decimal,
            "sentinels": [-999.0]}
    text = pd.Series(cells, dtype="str")
    numbers, flags = parse_numbers(text, spec)
    want_numbers, want_flags = _parse_cells(text, spec)
    np.testing.assert_array_equal(flags, want_flags)
    np.testing.assert_array_equal(numbers, want_numbers)  # NaN in the same places, numbers bit-equal
    together = parse_number_columns({"a": text, "b": text[::-1].reset_index(drop=True)}, spec)
    np.testing.assert_array_equal(together["a"][1], want_flags)
    np.testing.assert_array_equal(together["b"][0], want_numbers[::-1])


def test_arrow_cast_equals_to_numeric_bit_for_bit():
    rng = np.random.default_rng(5)
    cells = [f"{v:.{d}f}" for d in range(8) for v in rng.uniform(-1e4, 1e4, 500)]
    cells += [repr(float(v)) for v in rng.standard_normal(2000) * 10.0 ** rng.integers(-300, 300, 2000)]
    spec = {"missing_values": [""], "decimal": ".", "sentinels": []}
    numbers, _ = parse_numbers(pd.Series(cells, dtype="str"), spec)
    assert np.array_equal(numbers.view("int64"), pd.to_numeric(pd.Series(cells, dtype=object)).to_numpy().view("int64"))


def write(tmp_path, text: str, encoding="utf-8"):
    path = tmp_path / "dump.csv"
    path.write_bytes(text.encode(encoding))
    return path


SPEC = validate_format("x", {"layout": "wide_csv", "station_column": "site",
                             "time": {"column": "t", "format": "%Y-%m-%d %H:%M"},
                             "columns": {"v": "pm25"}, "units": {"pm25": "ug/m3"}})


def plain(path, spec=SPEC):
    data = path.read_bytes()
    return raw._plain_table(data, data.decode(spec["encoding"]), spec, path)


def test_plain_file_reads_as_the_careful_reader_reads_it(tmp_path):
    spec = {**SPEC, "header_line": 3}
    path = write(tmp_path, "exported by logger\r\nunits: ug/m3\r\nsite,t,v\r\nA,2025-01-01 00:00, 1.5\r\n"
                           "B,2025-01-01 01:00,\r\n")
    copy = tmp_path / "dump2.csv"
    copy.write_bytes(path.read_bytes())
    arrow, digest = plain(path, spec)
    files, fast = raw._joined([(path, arrow), (copy, arrow)], spec)  # two files, joined
    careful = raw.read_csv_text(path, spec).table
    pd.testing.assert_frame_equal(fast, pd.concat([careful, careful], ignore_index=True), check_dtype=False)
    assert fast["line"].tolist() == [4, 5, 4, 5]  # line numbers as an editor shows them, per file
    assert list(files) == [str(path), str(path), str(copy), str(copy)]
    assert digest == file_digest(path)  # the digest every other input of the project gets


@pytest.mark.parametrize("text", [
    "site,t,v\nA,2025-01-01 00:00,1\n\nB,2025-01-01 01:00,2\n",  # blank line: counted by the careful reader
    "site,t,v\nA,2025-01-01 00:00,1\n,,\n",  # a record of empty fields is blank too
    'site,t,v\nA,2025-01-01 00:00,"1"\n',  # quotes
    "site,t,v\rA,2025-01-01 00:00,1\r",  # old Mac line ends
    "site,t,v\nA,2025-01-01 00:00,1\nB,2025-01-01 01:00\n",  # a truncated record
    "site,t,v\nA,2025-01-01 00:00,1,9\n",  # one field too many
    "site,t,v\n",  # header only
    "site,t,v\nA\u00a0,2025-01-01 00:00,1\n",  # Unicode whitespace: stripping rules stay with pandas
])
def test_files_that_are_not_plain_go_to_the_careful_reader(tmp_path, text):
    assert plain(write(tmp_path, text)) is None


def test_other_encodings_go_to_the_careful_reader(tmp_path):
    spec = {**SPEC, "encoding": "latin-1"}
    assert plain(write(tmp_path, "site,t,v\nZ\u00fcrich,2025-01-01 00:00,1\n", "latin-1"), spec) is None


def test_localizing_each_distinct_stamp_once_matches_localizing_every_row():
    naive = pd.Series(pd.to_datetime(["2025-10-26 02:30", "2025-10-26 02:30", "2025-10-26 02:30",
                                      "2025-03-30 02:30", "2025-06-01 12:00", None, "2025-10-26 02:30"]))
    stations = pd.DataFrame({"station_id": ["a", "a", "b", "a", "a", "a", "a"]})
    spec = {"timezone": "CET", "ambiguous": "order", "nonexistent": "drop"}
    utc, reason, report = timeparse.localize_to_utc(naive, stations, spec)
    # Row by row, as pandas localizes: the first repeat of a station's hour is summer time (CEST).
    summer = np.array([True, False, True, True, True, True, False])
    expected = naive.dt.tz_localize("CET", ambiguous=summer, nonexistent="NaT").dt.tz_convert("UTC")
    expected[reason != ""] = pd.NaT
    pd.testing.assert_series_equal(utc, expected, check_names=False)
    assert reason.tolist() == ["", "", "", "nonexistent_local_time", "", "", ""]
    assert report["ambiguous_rows"] == 4 and report["ambiguous_assigned_summer_time"] == 2
