"""Quality control: duplicate rules, gap statistics and per-variable flag counts for the QC report.

Reads and writes nothing (core.py assembles the report and writes it). Obeys the format key
`duplicates` (keep_last | keep_first).

Duplicate rules, applied to rows still in play:
- exact duplicate: same station, same delivered timestamp text and identical delivered values
  (and variable and unit, in long layouts) as an earlier row; the earlier row is kept. Detected before
  DST resolution, so a re-delivered autumn day (A, B, A, B at the repeated hour) pairs up correctly.
- conflicting duplicate: same station and UTC hour (and variable) but different values. One row
  survives: the last in delivery order (files in name order, lines in order) under `keep_last`, on the
  view that a later line is a correction; the first under `keep_first`. The others are dropped, counted.
"""

import numpy as np
import pandas as pd

from pipeline.errors import one_line
from pipeline.variables import QC_FLAG_NAMES, QC_OK, qc_column

HOUR = pd.Timedelta(hours=1)


def mark_exact_duplicates(frame: pd.DataFrame, active: np.ndarray, keys: list[str],
                          values: list[str]) -> np.ndarray:
    """Boolean mask (over frame) of active rows that repeat an earlier active row exactly (keys and values).

    Only rows whose keys repeat can repeat exactly, and they are few: the values of those alone are compared.
    """
    duplicated = np.zeros(len(frame), dtype=bool)
    if active.any():
        maybe = np.zeros(len(frame), dtype=bool)
        maybe[active] = pd.Series(_row_keys(frame, keys)[active]).duplicated(keep=False).to_numpy()
        if maybe.any():
            duplicated[maybe] = frame.loc[maybe, [*keys, *values]].duplicated(keep="first").to_numpy()
    return duplicated


def mark_conflicting_duplicates(frame: pd.DataFrame, active: np.ndarray, keys: list[str],
                                policy: str) -> tuple[np.ndarray, int]:
    """(mask of active rows that lose a conflict, number of keys that had a conflict)."""
    losers = np.zeros(len(frame), dtype=bool)
    if not active.any():
        return losers, 0
    subset = pd.Series(_row_keys(frame, keys)[active])
    keep = "last" if policy == "keep_last" else "first"
    losers[active] = subset.duplicated(keep=keep).to_numpy()
    groups = int(subset[subset.duplicated(keep=False)].nunique())
    return losers, groups


def _row_keys(frame: pd.DataFrame, columns: list[str]) -> np.ndarray:
    """One int64 per row, equal for two rows exactly when their values in `columns` are all equal (missing
    values equal to each other, as DataFrame.duplicated has them)."""
    keys = np.zeros(len(frame), dtype="int64")
    for column in columns:
        codes, distinct = pd.factorize(frame[column], use_na_sentinel=False)
        # Distinct pairs stay distinct (codes < len(distinct)); renumbering keeps keys below the row count.
        keys = pd.factorize(keys * len(distinct) + codes)[0]
    return keys


def station_gaps(times: pd.Series, step: pd.Timedelta = HOUR) -> dict:
    """Gap statistics of one station from its delivered (kept) UTC stamps, counted in delivered steps.

    Counts are named in hours for an hourly delivery, else in steps (with the step's length beside them).
    """
    stamps = np.unique(times.to_numpy("datetime64[ns]").view("int64"))  # sorted
    first, last = stamps[0], stamps[-1]
    on_grid = int((last - first) / step.value) + 1
    steps = (np.diff(stamps) / step.value).astype(int) - 1  # missing steps before each delivered one
    gaps = steps[steps > 0]
    longest = int(gaps.max()) if len(gaps) else 0
    longest_start = _utc(stamps[int(np.argmax(steps))] + step.value).isoformat() if len(gaps) else None
    unit = "hours" if step == HOUR else "steps"
    stats = {"first": _utc(first).isoformat(), "last": _utc(last).isoformat(), f"{unit}_on_grid": on_grid,
             f"{unit}_with_data": len(stamps), f"missing_{unit}": on_grid - len(stamps),
             "gap_count": int(len(gaps)), f"longest_gap_{unit}": longest, "longest_gap_start": longest_start}
    return stats if step == HOUR else {**stats, "step": str(step)}


def _utc(nanoseconds) -> pd.Timestamp:
    return pd.Timestamp(int(nanoseconds), unit="ns", tz="UTC")


def flag_counts(clean: pd.DataFrame, variables) -> dict:
    """{variable: {flag name: count}} over the whole clean table (gap rows included)."""
    counts = {}
    for variable in variables:
        tally = np.bincount(clean[qc_column(variable)].to_numpy().astype("int64"), minlength=len(QC_FLAG_NAMES))
        counts[variable] = {name: int(tally[code]) if code < len(tally) else 0
                            for code, name in QC_FLAG_NAMES.items()}
    return counts


def top_codes(codes: pd.Series, limit: int = 20, width: int = 60) -> dict:
    """The most frequent offending codes with their counts, bounded in number and length (and escaped), so
    a bad file cannot bloat the report or put control characters into it."""
    top = {}
    for code, count in codes.value_counts().head(limit).items():
        key = one_line(code, width)
        top[key] = top.get(key, 0) + int(count)
    return top


def series_notes(clean: pd.DataFrame, variables, min_values: int = 24) -> dict:
    """Notes, not drops: stations none of whose values passed QC, and series (station, variable) with at
    least `min_values` valid values that never change (a stuck sensor or a filled-in constant)."""
    variables = list(variables)
    codes, stations = pd.factorize(clean["station_id"], sort=True)
    order = np.argsort(codes, kind="stable")
    starts = np.searchsorted(codes[order], np.arange(len(stations)))  # each station's rows, contiguous
    counts, lows, highs = (np.zeros((len(stations), len(variables))) for _ in range(3))
    for column, variable in enumerate(variables):  # a column at a time: a few MB, not the whole table
        values = clean[variable].to_numpy("float64")[order]
        valid = (clean[qc_column(variable)].to_numpy()[order] == QC_OK) & ~np.isnan(values)
        counts[:, column] = np.add.reduceat(valid.astype("int64"), starts)
        lows[:, column] = np.minimum.reduceat(np.where(valid, values, np.inf), starts)
        highs[:, column] = np.maximum.reduceat(np.where(valid, values, -np.inf), starts)
    without = [str(s) for s in stations[counts.sum(axis=1) == 0]]
    constant = {}
    for row, station in enumerate(stations):
        for column, variable in enumerate(variables):
            if counts[row, column] >= min_values and lows[row, column] == highs[row, column]:
                constant.setdefault(str(station), {})[variable] = float(lows[row, column])
    return {"stations_without_valid_values": without, "constant_series": constant}


def summary_row(report: dict) -> dict:
    """One line of a QC report for people: stations, rows read / kept, drops per reason, flagged values."""
    rows = report["rows"]
    dropped = ", ".join(f"{reason} {n}" for reason, n in sorted(rows["dropped_by_reason"].items()) if n)
    flagged = sum(n for counts in report.get("values", {}).values()
                  for flag, n in counts.items() if flag not in ("ok", "missing"))
    return {"stations": len(report.get("gaps", {})), "rows read": rows["read"], "rows kept": rows["kept"],
            "dropped": dropped or "none", "values flagged": flagged}
