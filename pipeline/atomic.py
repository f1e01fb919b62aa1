"""Atomic file writes: write a temporary file in the target folder, then os.replace it.

A reader (or Snakemake) never sees a half-written Parquet or JSON file, even if the job is killed.
Writes exactly the path given; reads nothing.
"""

import json
import os
import tempfile
from pathlib import Path

import pandas as pd


def _atomic(path, write) -> Path:
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    os.close(handle)
    try:
        write(temporary)
        os.replace(temporary, target)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    return target


def write_parquet_atomic(frame: pd.DataFrame, path) -> Path:
    return _atomic(path, lambda temporary: frame.to_parquet(temporary, index=False))


def write_csv_atomic(frame: pd.DataFrame, path) -> Path:
    return _atomic(path, lambda temporary: frame.to_csv(temporary, index=False))


def write_json_atomic(data: dict, path) -> Path:
    def write(temporary):
        with open(temporary, "w", encoding="utf-8") as handle:
            json.dump(data, handle, indent=2, sort_keys=True, default=str)
            handle.write("\n")
    return _atomic(path, write)


def write_text_atomic(text: str, path) -> Path:
    def write(temporary):
        with open(temporary, "w", encoding="utf-8", newline="") as handle:
            handle.write(text)
    return _atomic(path, write)
