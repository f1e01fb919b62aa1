"""Ingestion throughput and memory against pyarrow's CSV reader on the same bytes.

`python bench/ingest_vs_pyarrow.py [--days N] [--city NAME]` writes one invented city's raw dump (the demo
generator, `config/data/demo.yaml`) into a temporary folder, then in one run, side by side:
- pyarrow.csv.read_csv on every raw file of the city (bytes per second: the ceiling of reading CSV here);
- shiftgrid's ingestion of the same files (parse, time zones, units, QC, hourly grid);
- peak Python-heap memory of the ingestion (tracemalloc sees numpy and pandas buffers) against the
  size of the clean table it returns.
Prints each figure next to its goal (ingestion >= 0.5x pyarrow; peak <= 3x the output table). Never fails on
timings. The wide-CSV city is the default: it is the layout most deliveries use.
"""

from __future__ import annotations

import argparse
import tempfile
import time
import tracemalloc
from pathlib import Path

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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, default=365)
    parser.add_argument("--city", default="arlenvik")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    data_cfg = yaml.safe_load((REPO / "config" / "data" / "demo.yaml").read_text())
    stations = load_stations(REPO / data_cfg.get("stations", "config/stations.csv"))
    fmt = data_cfg["cities"][args.city]
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

        arrow_s = best_of(args.repeats, read_with_pyarrow)
        ingest_s = best_of(args.repeats, ingest)
        tracemalloc.start()
        clean, _ = ingest()
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
    table_bytes = int(clean.memory_usage(deep=True).sum())
    mb = n_bytes / 1e6
    print(f"city {args.city}: {len(paths)} raw files, {mb:.1f} MB, {args.days} days -> {len(clean):,} clean rows")
    print(f"pyarrow.csv.read_csv  {mb / arrow_s:8.1f} MB/s  ({arrow_s:.2f} s, best of {args.repeats})")
    print(f"shiftgrid ingestion   {mb / ingest_s:8.1f} MB/s  ({ingest_s:.2f} s, best of {args.repeats})")
    print(f"ratio ingestion / pyarrow: {arrow_s / ingest_s:.2f}x   (goal >= 0.5x)")
    print(f"peak memory {peak / 1e6:.1f} MB vs clean table {table_bytes / 1e6:.1f} MB: "
          f"{peak / table_bytes:.2f}x   (goal <= 3x)")


if __name__ == "__main__":
    main()
