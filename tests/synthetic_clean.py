"""Tiny synthetic clean tables (the clean-table schema of the project) and station tables for tests.

Not a test module: imported by tests/test_splits.py, test_windows.py and test_leakage.py.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.variables import QC_MISSING, QC_OK, VARIABLE_NAMES, qc_column

START = pd.Timestamp("2030-01-01", tz="UTC")


def clean_table(station_ids, hours: int, start=START, seed: int = 0, missing=()) -> pd.DataFrame:
    """One row per station x hour, every canonical variable, QC columns; sorted by station_id, time.

    Values: pm25 = 1000 * (station number + 1) + hour index (checkable by index); other variables are
    smooth seeded signals inside their plausible ranges. `missing` lists variables that are not
    delivered at all (all NaN, flagged QC_MISSING).
    """
    rng = np.random.default_rng(seed)
    frames = []
    for number, station_id in enumerate(station_ids):
        hour = np.arange(hours, dtype=np.float64)
        values = {name: 10.0 + 5.0 * np.sin(2 * np.pi * (hour + 3 * number) / 24) + rng.normal(0, 1, hours)
                  for name in VARIABLE_NAMES}
        values["pm25"] = 1000.0 * (number + 1) + hour
        values["wind_dir_deg"] = (37.0 * hour + 90 * number) % 360
        values["pressure_hpa"] = 1010.0 + rng.normal(0, 3, hours)
        values["rh_pct"] = np.clip(60 + 20 * np.sin(2 * np.pi * hour / 24), 0, 100)
        frame = pd.DataFrame({"station_id": station_id,
                              "time": pd.date_range(start, periods=hours, freq="h")})
        for name in VARIABLE_NAMES:
            frame[name] = np.nan if name in missing else values[name]
        frames.append(frame)
    return with_qc(pd.concat(frames, ignore_index=True))


def with_qc(table: pd.DataFrame) -> pd.DataFrame:
    """(Re)compute the `<var>_qc` columns from the NaNs of the value columns."""
    table = table.copy()
    table["station_id"] = table["station_id"].astype("string")
    for name in VARIABLE_NAMES:
        table[qc_column(name)] = np.where(table[name].isna(), QC_MISSING, QC_OK).astype(np.int8)
    return table.sort_values(["station_id", "time"], ignore_index=True)


def station_table(layout: dict[str, list[tuple[str, float, float]]]) -> pd.DataFrame:
    """{city: [(station_id, lat, lon), ...]} -> the station table's columns."""
    rows = [{"station_id": sid, "city": city, "lat": lat, "lon": lon, "elevation_m": 10.0,
             "site_type": "urban"} for city, stations in layout.items() for sid, lat, lon in stations]
    return pd.DataFrame(rows)
