"""`shiftgrid new-city draft FILE... [--city NAME] [--out BLOCK.yaml]` and `shiftgrid new-city check BLOCK.yaml`.

draft: reads a sample of an unknown raw dump (the given files) and prints (or writes with --out) a proposed
format block for the data config, every key with its confidence and the questions the data cannot answer
(pipeline.ingest.draft). check: ingests the dump with a block (a drafted file, a bare format dict or a
data config such as config/data/demo.yaml with --city) and prints the QC summary, writing no clean table
and no QC file (pipeline.ingest.draft_check). Paths are relative to the project root (--root); the raw
folder and station table come from the options, else the block file's `raw_dir` / `stations`, else the
defaults data/raw and config/stations.csv. Config keys obeyed: none (the block file's own keys).
"""

from __future__ import annotations

import glob
from pathlib import Path

from pipeline.errors import InputError
from pipeline.names import CITY_NAME, check_name


def add_arguments(parser) -> None:
    steps = parser.add_subparsers(dest="step", required=True)
    draft = steps.add_parser("draft", help="propose a format block from a sample of the dump")
    draft.add_argument("files", nargs="+", help="dump files or glob patterns, e.g. data/raw/newtown/*.csv")
    draft.add_argument("--city", help="city name for the block (default: the files' folder name)")
    draft.add_argument("--raw-dir", default="data/raw", help="folder the block's `files` glob is relative to")
    draft.add_argument("--max-rows", type=int, default=200_000, help="records read per file (default 200000)")
    draft.add_argument("--out", help="write the block to this file instead of printing it")
    check = steps.add_parser("check", help="ingest with a block without writing anything; print the QC summary")
    check.add_argument("block", help="a drafted block, a bare format dict or a data config (YAML)")
    check.add_argument("--city", help="which city of the file (needed when it holds several)")
    check.add_argument("--raw-dir", help="raw folder (default: the file's raw_dir, else data/raw)")
    check.add_argument("--stations", help="station table (default: the file's stations, else config/stations.csv)")


def _files(root: Path, patterns: list[str]) -> list[Path]:
    found = []
    for pattern in patterns:
        matches = sorted(glob.glob(str(root / pattern)))
        if not matches:
            raise InputError("no file matches", file=pattern, field="files")
        found += [Path(m) for m in matches if Path(m).is_file()]
    return found


def _draft(args, root: Path) -> int:
    from pipeline.ingest.draft import draft_format, render

    files = _files(root, args.files)
    city = check_name(args.city or files[0].parent.name.lower(), CITY_NAME, field="--city")
    text = render(draft_format(files, city, root / args.raw_dir, args.max_rows))
    if args.out:
        from pipeline.atomic import write_text_atomic

        write_text_atomic(text, root / args.out)
        print(f"draft written to {args.out}; try it with: shiftgrid new-city check {args.out}")
    else:
        print(text, end="")
    return 0


def _check(args, root: Path) -> int:
    from pipeline.ingest.draft_check import check_format, load_block, summary_lines

    city, fmt, around = load_block(root / args.block, args.city)
    raw_dir = root / (args.raw_dir or around.get("raw_dir") or "data/raw")
    stations = root / (args.stations or around.get("stations") or "config/stations.csv")
    report = check_format(city, fmt, raw_dir, stations, float(around.get("reference_temperature_c", 25.0)),
                          config_file=args.block)
    print("\n".join(summary_lines(report)))
    print("nothing written: add the block under data.cities in a config/data file to ingest it for real")
    return 0


def run(args) -> int:
    root = Path(args.root)
    return _draft(args, root) if args.step == "draft" else _check(args, root)
