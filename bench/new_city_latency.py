"""Wall time of `shiftgrid new-city draft` and `check` next to a real ingestion of the same dump (never pass/fail).

    .venv/bin/python bench/new_city_latency.py [--days 30] [--city arlenvik] [--rounds 3]

Writes the demo's dumps for --days into a temporary folder, then, in each round and in turn (so figures
compared side by side saw the same machine load): the draft of the city's format from its files, the check
of the shipped block (ingestion without writing), and the real ingestion that writes the clean table and
the QC file (pipeline.ingest.run_ingest). Prints the median of --rounds rounds of each, in-process (no
interpreter start-up), and the ratios to the real ingestion. The goal of the check is to cost what the
ingestion costs minus its writes, so that a format can be tried again in seconds. CI does not run this.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))


def main() -> int:
    import yaml

    from pipeline.demo import generate_demo
    from pipeline.ingest import run_ingest
    from pipeline.ingest.draft import draft_format
    from pipeline.ingest.draft_check import check_format
    from pipeline.stations import load_stations

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, default=30)
    parser.add_argument("--city", default="arlenvik")
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    config = yaml.safe_load((REPO / "config" / "data" / "demo.yaml").read_text())
    stations_csv = REPO / config["stations"]
    fmt = config["cities"][args.city]
    with tempfile.TemporaryDirectory() as folder:
        raw = Path(folder) / "raw"
        generate_demo(raw, load_stations(stations_csv), {args.city: fmt}, "2025-03-01", args.days, 7)
        files = sorted(raw.glob(fmt["files"]))
        steps = {"draft": lambda: draft_format(files, args.city, raw),
                 "check": lambda: check_format(args.city, fmt, raw, stations_csv),
                 "ingest (writes)": lambda: run_ingest(args.city, fmt, raw, stations_csv, Path(folder) / "c.parquet",
                                                       Path(folder) / "q.json")}
        times = {name: [] for name in steps}
        for _ in range(args.rounds + 1):  # the first round warms imports and caches, not counted
            for name, step in steps.items():
                started = time.perf_counter()
                step()
                times[name].append(time.perf_counter() - started)
        rows = sum(1 for f in files for _ in f.open()) - len(files)
    base = statistics.median(times["ingest (writes)"][1:])
    print(f"{args.city}, {args.days} days, {len(files)} file(s), {rows} records; median of {args.rounds} rounds")
    for name, values in times.items():
        median = statistics.median(values[1:])
        print(f"  {name:<16} {median:7.2f} s   x{median / base:5.2f} of the real ingestion")
    return 0


if __name__ == "__main__":
    sys.exit(main())
