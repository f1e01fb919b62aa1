"""Timestamps: delivered text -> UTC, with the daylight-saving decisions made explicit.

Reads and writes nothing. Obeys the format key `time` (format, timezone, label, ambiguous, nonexistent,
earliest, latest).

Plausible window: a stamp before `time.earliest` or after `time.latest` (never later than the time of
ingestion) is a typo or a broken logger clock. Such rows are dropped and counted
(`timestamp_outside_window`) before anything else looks at them: one row stamped 2099 would otherwise
stretch its station's hourly grid by 650,000 empty rows, and a year 9999 would exhaust memory.

Local clock time with DST has two awkward hours a year:
- autumn: one local hour happens twice. Policy `order` (default) pairs repeats in delivery order:
  the first row of a station (and variable) at that local hour is the summer-time instant, the second
  the standard-time instant (a logger writes them in that order). A lone row is taken as summer time
  and counted. `dst` / `standard` force one reading; `drop` drops such rows (counted).
- spring: one local hour does not exist. Rows stamped inside it are dropped and counted
  (`nonexistent_local_time`): no reading can honestly be placed there.
"""

import re

import numpy as np
import pandas as pd

_OFFSET_SUFFIX = re.compile(r"(?:Z|[+-]\d{2}:?\d{2})$")


def parse_text(text: pd.Series, time_spec: dict) -> pd.Series:
    """Text -> datetimes: naive local for strftime formats, UTC-aware for iso8601 / epoch_s.

    Unparseable text gives NaT. Each distinct text is parsed once: a network repeats every stamp once per
    station (and variable), and parsing is per text, so the result is the same as parsing every row.
    """
    codes, distinct = pd.factorize(text, use_na_sentinel=False)
    parsed = _parse_distinct(pd.Series(distinct, dtype=text.dtype), time_spec["format"])
    return pd.Series(parsed.array.take(codes), index=text.index, name=text.name)


def _parse_distinct(text: pd.Series, fmt: str) -> pd.Series:
    if fmt == "iso8601":
        has_offset = text.str.contains(_OFFSET_SUFFIX, regex=True)
        parsed = pd.to_datetime(text.where(has_offset), format="ISO8601", utc=True, errors="coerce")
        return parsed
    if fmt == "epoch_s":
        seconds = pd.to_numeric(text, errors="coerce")
        return pd.to_datetime(seconds, unit="s", utc=True, errors="coerce")
    return pd.to_datetime(text, format=fmt, errors="coerce")


def is_aware(parsed: pd.Series) -> bool:
    return getattr(parsed.dt, "tz", None) is not None


def localize_to_utc(naive: pd.Series, group_keys: pd.DataFrame, time_spec: dict) -> tuple[pd.Series, pd.Series, dict]:
    """Naive local datetimes -> UTC.

    `group_keys` (same index) holds the columns that identify one series (station, and variable for
    long layouts); rows must be in delivery order. Returns (utc with NaT where dropped,
    reason per row: "" or a drop reason, DST report).
    """
    tz = time_spec["timezone"]
    policy = time_spec["ambiguous"]
    report = {"timezone": tz, "ambiguous_policy": policy, "nonexistent_policy": time_spec["nonexistent"],
              "ambiguous_rows": 0, "ambiguous_assigned_summer_time": 0,
              "ambiguous_assigned_standard_time": 0, "ambiguous_lone_rows": 0,
              "ambiguous_rows_dropped": 0, "nonexistent_rows_dropped": 0}
    # Localizing is per stamp, so each distinct local stamp is localized once, every way it may be read.
    codes, distinct = pd.factorize(naive, use_na_sentinel=False)
    local = pd.Series(distinct)
    # Cheap passes tell the cases apart: NaT under ambiguous="NaT" (with nonexistent shifted) marks
    # repeated local hours; NaT under nonexistent="NaT" marks skipped local hours.
    repeated = local.dt.tz_localize(tz, ambiguous="NaT", nonexistent="shift_forward").isna().to_numpy()
    as_summer = local.dt.tz_localize(tz, ambiguous=np.ones(len(local), dtype=bool), nonexistent="NaT")
    as_standard = local.dt.tz_localize(tz, ambiguous=np.zeros(len(local), dtype=bool), nonexistent="NaT")
    skipped = as_summer.isna().to_numpy()
    ambiguous = pd.Series(repeated[codes], index=naive.index) & naive.notna()
    nonexistent = pd.Series(skipped[codes], index=naive.index) & naive.notna() & ~ambiguous
    occurrence = pd.Series(0, index=naive.index)
    if ambiguous.any():
        keys = group_keys[ambiguous].copy()
        keys["_local"] = naive[ambiguous]
        occurrence[ambiguous] = keys.groupby(list(keys.columns), sort=False).cumcount()
        size = keys.groupby(list(keys.columns), sort=False)["_local"].transform("size")
        report["ambiguous_lone_rows"] = int((size == 1).sum())
    if policy == "standard":
        summer = ~ambiguous.to_numpy()
    elif policy == "dst":
        summer = np.ones(len(naive), dtype=bool)
    else:  # order (and drop: the flag is unused for dropped rows)
        summer = (occurrence == 0).to_numpy()
    # The flag only matters for repeated hours; elsewhere both readings are the same instant.
    utc = pd.Series(as_summer.array.take(codes), index=naive.index).where(
        summer, pd.Series(as_standard.array.take(codes), index=naive.index)).dt.tz_convert("UTC")
    reason = pd.Series("", index=naive.index, dtype=object)
    reason[nonexistent] = "nonexistent_local_time"
    report["nonexistent_rows_dropped"] = int(nonexistent.sum())
    report["ambiguous_rows"] = int(ambiguous.sum())
    if policy == "drop":
        reason[ambiguous] = "ambiguous_local_time"
        report["ambiguous_rows_dropped"] = int(ambiguous.sum())
    else:
        report["ambiguous_assigned_summer_time"] = int((ambiguous & pd.Series(summer, index=naive.index)).sum())
        report["ambiguous_assigned_standard_time"] = report["ambiguous_rows"] - report["ambiguous_assigned_summer_time"]
    utc[reason != ""] = pd.NaT
    return utc, reason, report


def apply_label(utc: pd.Series, time_spec: dict, step: pd.Timedelta = pd.Timedelta(hours=1)) -> pd.Series:
    """Period-ending stamps (label `end`) name a delivered step by its end: move them to its start."""
    return utc - step if time_spec["label"] == "end" else utc


# Real UTC offsets lie within [-12 h, +14 h] and hour-ending labels move a stamp by one hour: a naive
# local stamp this far outside the window is outside it in UTC too.
LOCAL_SLACK = pd.Timedelta(hours=15)


def window_bounds(time_spec: dict, now: pd.Timestamp | None = None) -> tuple[pd.Timestamp, pd.Timestamp]:
    """(earliest, latest) as UTC instants; latest is never later than `now` (default: this moment)."""
    now = pd.Timestamp.now(tz="UTC") if now is None else now
    latest = now if time_spec.get("latest") is None else min(pd.Timestamp(time_spec["latest"]), now)
    return pd.Timestamp(time_spec["earliest"]), latest


def outside_window(times: pd.Series, bounds: tuple[pd.Timestamp, pd.Timestamp]) -> np.ndarray:
    """Mask of stamps outside [earliest, latest]. Naive stamps (local clock) are compared with
    LOCAL_SLACK around the bounds; UTC stamps exactly. NaT is never outside."""
    earliest, latest = bounds
    if not is_aware(times):
        earliest, latest = (earliest - LOCAL_SLACK).tz_localize(None), (latest + LOCAL_SLACK).tz_localize(None)
    return (times.notna() & ((times < earliest) | (times > latest))).to_numpy()
