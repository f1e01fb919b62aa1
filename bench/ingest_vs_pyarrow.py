"""Ingestion throughput and memory against pyarrow's CSV reader on the same bytes.

`python bench/ingest_vs_pyarrow.py [--days N] [--city NAME]` writes one invented city's raw dump (the demo
generator, `config/data/demo.yaml`) into a temporary folder, then in one run, side by side:
- pyarrow.csv.read_csv on every raw file of the city (bytes per second: the ceiling of reading CSV here);
- shiftgrid's ingestion of the same files (parse, time zones, units, QC, hourly grid);
- peak memory of the ingestion against the size of the clean table it returns, measured in a fresh
  process: tracemalloc's peak (numpy buffers, Python objects) plus the peak of pyarrow's memory pool
  (Arrow buffers, which back pandas' string columns and which tracemalloc does not see). The sum is an
  upper bound: the two peaks need not fall at the same moment.
Prints each figure next to its goal (ingestion >= 0.5x pyarrow; peak <= 3x the output table). Never fails on
timings. The wide-CSV city is the default: it is the layout most deliveries use.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import pyarrow as pa
import pyarrow.csv as pacsv
import yaml

from pipeline.demo import generate_demo
from pipeline.ingest.core import ingest_city, raw_files
from pipeline.stations import load_stations

REPO = Path(__file__).resolve().parents[1]


def best_of(repeats: int, work) -> float:
    times = []
    for _ in range(repeats):
        began = time.perf_counter()
        work()
        times.append(time.perf_counter() - began)
    return min(times)


def demo_setup(city: str):
    data_cfg = yaml.safe_load((REPO / "config" / "data" / "demo.yaml").read_text())
    stations = load_stations(REPO / data_cfg.get("stations", "config/stations.csv"))
    return stations, data_cfg["cities"][city]


def peak_memory(city: str, raw: str) -> dict:
    """Run in a fresh process (--peak-of): the ingestion's peak memory and the clean table's size."""
    stations, fmt = demo_setup(city)
    pool = pa.default_memory_pool()
    ingest_city(city, fmt, Path(raw), stations)  # warm: one-time loads (unit registry, lazy imports) aside
    tracemalloc.start()
    clean, _ = ingest_city(city, fmt, Path(raw), stations)
    heap = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return {"heap": heap, "arrow": pool.max_memory(), "table": int(clean.memory_usage(deep=True).sum()),
            "rows": len(clean)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, default=365)
    parser.add_argument("--city", default="arlenvik")
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--peak-of", metavar="RAW_DIR", help=argparse.SUPPRESS)  # the child process's mode
    args = parser.parse_args()
    if args.peak_of:
        print(json.dumps(peak_memory(args.city, args.peak_of)))
        return
    stations, fmt = demo_setup(args.city)
    with tempfile.TemporaryDirectory() as folder:
        raw = Path(folder)
        generate_demo(raw, stations, {args.city: fmt}, "2025-01-01", args.days, seed=7)
        paths = [Path(p) for p in raw_files(raw, args.city, fmt)]
        n_bytes = sum(p.stat().st_size for p in paths)
        separator = fmt.get("separator", ",")

        def read_with_pyarrow():
            for path in paths:
                pacsv.read_csv(path, parse_options=pacsv.ParseOptions(delimiter=separator))

        def ingest():
            return ingest_city(args.city, fmt, raw, stations)

        # Alternate the sides, best of N each, so both see the same machine load.
        arrow_times, ingest_times = [], []
        for _ in range(args.rounds):
            arrow_times.append(best_of(1, read_with_pyarrow))
            ingest_times.append(best_of(1, ingest))
        arrow_s, ingest_s = min(arrow_times), min(ingest_times)
        child = subprocess.run([sys.executable, __file__, "--city", args.city, "--peak-of", str(raw)],
                               check=True, capture_output=True, text=True)
        memory = json.loads(child.stdout.strip().splitlines()[-1])
    mb = n_bytes / 1e6
    peak = memory["heap"] + memory["arrow"]
    print(f"city {args.city}: {len(paths)} raw files, {mb:.1f} MB, {args.days} days -> {memory['rows']:,} clean rows")
    print(f"pyarrow.csv.read_csv  {mb / arrow_s:8.1f} MB/s  ({arrow_s:.3f} s, best of {args.rounds})")
    print(f"shiftgrid ingestion   {mb / ingest_s:8.1f} MB/s  ({ingest_s:.3f} s, best of {args.rounds})")
    print(f"ratio ingestion / pyarrow: {arrow_s / ingest_s:.2f}x   (goal >= 0.5x)")
    print(f"peak memory {peak / 1e6:.1f} MB (Python heap {memory['heap'] / 1e6:.1f} + Arrow pool "
          f"{memory['arrow'] / 1e6:.1f}) vs clean table {memory['table'] / 1e6:.1f} MB: "
          f"{peak / memory['table']:.2f}x   (goal <= 3x)")


if __name__ == "__main__":
    main()
