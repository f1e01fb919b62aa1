"""Demo generator: determinism, dumps that ingest with the predicted counts, and the documented truth."""

import hashlib
from pathlib import Path

import numpy as np
import pytest
import yaml

from pipeline.demo import generate_demo
from pipeline.demo.simulate import DEMO_PROFILES, simulate
from pipeline.ingest import ingest_city
from pipeline.stations import load_stations

ROOT = Path(__file__).resolve().parents[1]
CONFIG = yaml.safe_load((ROOT / "config" / "data" / "demo.yaml").read_text())
STATIONS = load_stations(ROOT / CONFIG["stations"])


def digests(folder: Path) -> dict:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def generate(folder, start="2025-03-28", days=5, seed=11):
    return generate_demo(folder, STATIONS, CONFIG["cities"], start, days, seed)


def test_same_seed_gives_identical_bytes_other_seed_differs(tmp_path):
    first = generate(tmp_path / "a")
    generate(tmp_path / "b")
    generate(tmp_path / "c", seed=12)
    assert digests(tmp_path / "a") == digests(tmp_path / "b")
    assert digests(tmp_path / "a") != digests(tmp_path / "c")
    assert set(first["cities"]) == set(CONFIG["cities"]) and len(digests(tmp_path / "a")) >= 6


def test_rerun_removes_stale_files(tmp_path):
    generate(tmp_path, start="2025-03-28", days=5)
    generate(tmp_path, start="2025-05-01", days=2)
    months = {p.name.rsplit("_", 1)[-1] for p in (tmp_path / "arlenvik").iterdir()}
    assert months == {"2025-05.csv"}


@pytest.mark.parametrize("start", ["2025-03-28", "2025-10-24"])  # spring and autumn DST changes
def test_generated_dumps_ingest_with_the_predicted_counts(tmp_path, start):
    summary = generate(tmp_path, start=start)
    for city, injected in summary["cities"].items():
        clean, qc = ingest_city(city, CONFIG["cities"][city], tmp_path, STATIONS,
                                CONFIG["reference_temperature_c"])
        rows, dropped = qc["rows"], qc["rows"]["dropped_by_reason"]
        assert rows["read"] == injected["records_written"], city
        assert rows["kept"] == injected["expected_rows_kept"], city
        for reason in ("exact_duplicate", "conflicting_duplicate", "unknown_station",
                       "nonexistent_local_time", "unparseable_record"):
            assert dropped[reason] == injected[reason], (city, reason)
        for flag, key in (("sentinel", "sentinel_values"), ("out_of_range", "out_of_range_values"),
                          ("unparseable", "unparseable_values")):
            found = {v: c[flag] for v, c in qc["values"].items() if c[flag]}
            assert found == injected[key], (city, flag)
        gaps = {s: {k: g[k] for k in ("missing_hours", "longest_gap_hours")} for s, g in qc["gaps"].items()}
        assert gaps == injected["stations"], city
        assert len(clean) == 5 * 24 * len(injected["stations"]), city  # grid = full period, gaps as rows
    layouts = {summary["cities"][c]["layout"] for c in summary["cities"]}
    assert layouts == {"wide_csv", "long_csv", "jsonl"}


def test_spring_dump_contains_a_skipped_local_hour_for_cities_on_local_clock(tmp_path):
    summary = generate(tmp_path, start="2025-03-28")
    assert summary["cities"]["arlenvik"]["skipped_local_hour"] == "2025-03-30T02:00:00"
    assert summary["cities"]["brumeholt"]["skipped_local_hour"] is None  # UTC stamps


def test_documented_aux_link_shows_in_the_simulation():
    # docs/demo-scenario.md: aux drives pm25 emissions in three cities, is noise in two, reversed in one.
    truth = simulate(STATIONS, "2025-01-01", 60, CONFIG["generator"]["seed"])
    for city, frame in truth.items():
        correlation = np.corrcoef(frame["aux"], frame["pm25"])[0, 1]
        link = DEMO_PROFILES[city].aux_link
        if link == "drives":
            assert correlation > 0.2, city
        elif link == "reversed":
            assert correlation < -0.1, city
        else:
            assert abs(correlation) < 0.2, city
    assert {p.aux_link for p in DEMO_PROFILES.values()} == {"drives", "noise", "reversed"}


def test_shared_mechanism_wind_disperses_and_night_traps(tmp_path):
    # The invariant mechanism: in every city PM2.5 is higher in calm hours than in windy ones.
    truth = simulate(STATIONS, "2025-01-01", 30, 5)
    for city, frame in truth.items():
        calm = frame["wind_speed_ms"] < frame["wind_speed_ms"].quantile(0.25)
        windy = frame["wind_speed_ms"] > frame["wind_speed_ms"].quantile(0.75)
        assert frame.loc[calm, "pm25"].mean() > 1.3 * frame.loc[windy, "pm25"].mean(), city
