"""Drafting a city's format, the clock part: which column(s) hold the time, in which format, on which clock.

Reads nothing from disk: it gets the sample's text columns (pipeline.ingest.draft reads the files).
Answers the `time` block of a format dict (see pipeline.ingest.formats) with a confidence and, where the
data cannot tell, a question for the person reviewing the draft.

How the time zone is answered from the data:
- stamps that carry their UTC offset (ISO 8601 with Z or +hh:mm, epoch seconds) need no zone at all;
- a local clock with daylight saving repeats one hour in autumn (two different readings of a station at
  the same stamp) and skips one in spring (most stations have no row at that stamp while they have the
  hours around it). Each tz database zone whose transitions fall exactly on the repeated and skipped
  hours of the sample, and none elsewhere in it, fits; zones that fit with the same UTC offsets over the
  sample are equivalent for this data, and one of them is proposed;
- no repeated or skipped hour where common zones change their clocks means a clock without DST (UTC or a
  fixed offset): which offset the data cannot say, so the draft asks; a sample that spans no DST change
  at all cannot tell either.
"""

from __future__ import annotations

import re
import zoneinfo
from dataclasses import dataclass, field
from datetime import datetime, timezone

import numpy as np
import pandas as pd

_DATES = ("%Y-%m-%d", "%Y/%m/%d", "%d.%m.%Y", "%d/%m/%Y", "%m/%d/%Y", "%d-%m-%Y", "%Y%m%d")
_TIMES = (" %H:%M", " %H:%M:%S", "T%H:%M", "T%H:%M:%S", " %H")
STRFTIME_CANDIDATES = tuple(d + t for d in _DATES for t in _TIMES) + _DATES  # date alone: daily data
_OFFSET_SUFFIX = re.compile(r"(?:Z|[+-]\d{2}:?\d{2})$")
# Timestamp parts by the names agencies give them (lower case, separators removed).
PART_NAMES = {"year": ("year", "yr", "yyyy", "yy"), "month": ("month", "mo", "mon", "mm"),
              "day": ("day", "dy", "dd", "dom"), "hour": ("hour", "hr", "hh", "hod"),
              "minute": ("minute", "min", "mi")}
_PART_RANGES = {"year": (1900, 2100), "month": (1, 12), "day": (1, 31), "hour": (0, 24), "minute": (0, 59)}
# Legacy rule names read more plainly than one city of many equivalent ones (CET rather than Africa/Ceuta).
_PREFERRED_ZONES = ("UTC", "CET", "EET", "WET", "MET", "EST5EDT", "CST6CDT", "MST7MDT", "PST8PDT")
# Zones that change their clocks on different dates: when none of their changes shows in a sample that
# covers them, the clock keeps no DST.
_COMMON_DST_ZONES = ("Europe/London", "CET", "EET", "America/New_York", "America/Chicago", "America/Denver",
                     "America/Los_Angeles", "America/Santiago", "Australia/Sydney", "Pacific/Auckland")
MOSTLY = 0.98  # share of a column's non-empty values that must parse for a time candidate (defects happen)


@dataclass
class ClockDraft:
    """The proposed `time` block, how sure the draft is, and what the reviewer must answer."""
    time: dict
    confidence: str  # high | medium | low
    evidence: list[str] = field(default_factory=list)
    questions: list[str] = field(default_factory=list)
    columns: list[str] = field(default_factory=list)  # the columns the stamp is read from
    spare: list[str] = field(default_factory=list)  # other columns holding the time (not values)
    step: pd.Timedelta | None = None  # the most common step between consecutive stamps (the cadence)


def modal_step(stamps: pd.Series) -> pd.Timedelta | None:
    """The most common step between consecutive distinct stamps: the delivery's cadence."""
    steps = pd.Series(stamps.dropna().unique()).sort_values().diff().dropna()
    steps = steps[steps > pd.Timedelta(0)]
    return steps.mode().iloc[0] if len(steps) else None


def _key(name: str) -> str:
    return re.sub(r"[^a-z0-9]", "", name.lower())


def _share_parsed(parsed: pd.Series, text: pd.Series) -> float:
    """The share of non-empty values parsed; a column of a few distinct stamps may hold two bad ones."""
    filled = text.str.strip() != ""
    good, bad = int(parsed[filled].notna().sum()), int(parsed[filled].isna().sum())
    if good >= 3 and bad <= 2:
        return max(MOSTLY, good / (good + bad))
    return good / (good + bad) if good + bad else 0.0


def stamp_formats(text: pd.Series) -> list[tuple[str, float]]:
    """Formats under which most of a column's (distinct) values parse, best first: iso8601 (offset in every
    stamp), epoch_s, then strftime patterns. Several strftime patterns tie when day and month are ambiguous."""
    values = pd.Series(text.dropna().astype(str).str.strip().unique())
    values = values[values != ""]
    if values.empty:
        return []
    found = []
    if values.str.contains(_OFFSET_SUFFIX, regex=True).mean() >= MOSTLY:
        parsed = pd.to_datetime(values, format="ISO8601", utc=True, errors="coerce")
        found.append(("iso8601", _share_parsed(parsed, values)))
    numbers = pd.to_numeric(values, errors="coerce")
    if numbers.notna().mean() >= MOSTLY and numbers.between(3e8, 4.2e9).mean() >= MOSTLY:
        found.append(("epoch_s", float(numbers.between(3e8, 4.2e9).mean())))  # 1979 .. 2103
    if numbers.notna().mean() >= MOSTLY:
        return found  # plain numbers are no date text
    head = values.head(20)  # a pattern that fails on the first values is not tried on all of them
    for pattern in STRFTIME_CANDIDATES:
        if _share_parsed(pd.to_datetime(head, format=pattern, errors="coerce"), head) >= 0.9:
            found.append((pattern, _share_parsed(pd.to_datetime(values, format=pattern, errors="coerce"), values)))
    return sorted([(f, s) for f, s in found if s >= MOSTLY], key=lambda item: -item[1])


def _integers(text: pd.Series) -> pd.Series | None:
    numbers = pd.to_numeric(text.str.strip(), errors="coerce")
    if numbers.notna().mean() < MOSTLY or not (numbers.dropna() % 1 == 0).all():
        return None
    return numbers


def find_parts(table: pd.DataFrame) -> dict | None:
    """{part: column} when the table has year, month, day and hour columns (named so, with fitting values)."""
    parts = {}
    for column in table.columns:
        for part, names in PART_NAMES.items():
            if part not in parts and _key(column) in names:
                numbers = _integers(table[column])
                low, high = _PART_RANGES[part]
                if numbers is not None and numbers.dropna().between(low, high).all():
                    parts[part] = column
    return parts if {"year", "month", "day", "hour"} <= set(parts) else None


def parts_text(table: pd.DataFrame, parts: dict) -> pd.Series:
    """The parts joined as the ingestion joins them (pipeline.ingest.raw.time_text)."""
    from pipeline.ingest.raw import time_text

    return time_text(table, {"parts": parts})


def _hours_of(naive: pd.Series) -> pd.DatetimeIndex:
    return pd.date_range(naive.min().floor("h"), naive.max().ceil("h"), freq="h")


def _anomalies(naive: pd.Series, station: pd.Series, content: pd.Series):
    """(stamps repeated with different readings at most stations, stamps skipped by most stations,
    station count per hour) of the sample's local stamps."""
    frame = pd.DataFrame({"local": naive, "station": station, "content": content}).dropna(subset=["local"])
    frame = frame.drop_duplicates()  # an exactly repeated line is a duplicate, not a clock's second pass
    per = frame.groupby(["local", "station"]).size()
    repeats = (per >= 2).groupby(level="local").mean()
    repeated = set(repeats.index[repeats >= 0.5])
    counts = per.groupby(level="local").size().reindex(_hours_of(frame["local"]), fill_value=0)
    before, after = counts.shift(1, fill_value=0), counts.shift(-1, fill_value=0)
    lonely = (before > 0) & (after > 0) & (counts <= 0.5 * np.minimum(before, after))
    return repeated, set(counts.index[lonely]), counts


def _transitions(zone: str, hours: pd.DatetimeIndex) -> tuple[set, set]:
    """(repeated local hours, skipped local hours) of `zone` among `hours`."""
    localized = pd.Series(hours)
    ambiguous = localized.dt.tz_localize(zone, ambiguous="NaT", nonexistent="shift_forward").isna()
    missing = localized.dt.tz_localize(zone, ambiguous=np.ones(len(hours), dtype=bool), nonexistent="NaT").isna()
    return set(hours[ambiguous.to_numpy()]), set(hours[(missing & ~ambiguous).to_numpy()])


def _probe(stamp: datetime, zone: str) -> str:
    """"repeated", "skipped" or "" for one local stamp in one zone (cheap: no pandas, for every zone)."""
    try:
        tz = zoneinfo.ZoneInfo(zone)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError, OSError):
        return ""
    first, second = stamp.replace(tzinfo=tz, fold=0), stamp.replace(tzinfo=tz, fold=1)
    if first.utcoffset() == second.utcoffset():
        return ""
    back = first.astimezone(timezone.utc).astimezone(tz).replace(tzinfo=None)
    return "repeated" if back == stamp else "skipped"


def _judged(stamps: set, counts: pd.Series) -> set:
    """The stamps the sample can speak about: data on both sides of them."""
    hour = pd.Timedelta(hours=1)
    return {s for s in stamps if counts.get(s - hour, 0) > 0 and counts.get(s + hour, 0) > 0}


def _representative(zones: list[str]) -> str:
    for name in _PREFERRED_ZONES:
        if name in zones:
            return name
    regional = [z for z in zones if "/" in z and not z.startswith(("Etc/", "US/", "SystemV/", "posix", "right"))]
    return sorted(regional or zones)[0]


def _signature(zone: str, hours: pd.DatetimeIndex) -> tuple:
    utc = pd.Series(hours).dt.tz_localize(zone, ambiguous=np.ones(len(hours), dtype=bool),
                                          nonexistent="shift_forward").dt.tz_convert("UTC")
    return tuple((utc - pd.Series(hours).dt.tz_localize("UTC")).dt.total_seconds().astype(int))


def fitting_zones(naive: pd.Series, station: pd.Series, content: pd.Series) -> tuple[list[str], str]:
    """(zones whose DST transitions match the sample, in one equivalence group, best name first; evidence)."""
    repeated, skipped, counts = _anomalies(naive, station, content)
    hours = counts.index
    seen = sorted(repeated | skipped)
    if not seen:
        return [], ""
    candidates = [zone for zone in sorted(zoneinfo.available_timezones())
                  if any(_probe(stamp.to_pydatetime(), zone) == ("repeated" if stamp in repeated else "skipped")
                         for stamp in seen)]
    fits = {}
    for zone in candidates:
        ambiguous, missing = _transitions(zone, hours)
        judged_a, judged_m = _judged(ambiguous, counts), _judged(missing, counts)
        if judged_a <= repeated and judged_m <= skipped and (judged_a or judged_m):
            fits[zone] = len(judged_a) + len(judged_m)
    if not fits:
        return [], ""
    best = max(fits.values())
    groups: dict[tuple, list[str]] = {}
    for zone in (z for z, n in fits.items() if n == best):
        groups.setdefault(_signature(zone, hours), []).append(zone)
    group = max(groups.values(), key=len)
    name = _representative(group)
    shown = ", ".join(f"{s:%Y-%m-%d %H:%M} repeated" for s in sorted(repeated & _transitions(name, hours)[0]))
    skipped_shown = ", ".join(f"{s:%Y-%m-%d %H:%M} skipped" for s in sorted(skipped & _transitions(name, hours)[1]))
    evidence = "; ".join(x for x in (shown, skipped_shown) if x)
    return [name] + sorted(z for z in group if z != name), evidence


def _common_changes_in_sample(naive: pd.Series) -> list[str]:
    """Changes of common DST zones that lie inside the sample, e.g. 'CET 2025-03-30 02:00'."""
    hours = _hours_of(naive.dropna())
    present = set(naive.dropna())
    changes = []
    for zone in _COMMON_DST_ZONES:
        ambiguous, missing = _transitions(zone, hours)
        for stamp in sorted(ambiguous | missing):
            hour = pd.Timedelta(hours=1)
            if stamp - hour in present and stamp + hour in present:
                changes.append(f"{zone} {stamp:%Y-%m-%d %H:%M}")
    return changes


def answer_clock(naive: pd.Series, station: pd.Series, content: pd.Series) -> tuple[dict, str, list, list]:
    """(time-block keys for a naive local clock, confidence, evidence, questions)."""
    zones, evidence = fitting_zones(naive, station, content)
    if zones:
        others = ", ".join(zones[1:6]) + (" ..." if len(zones) > 6 else "")
        return ({"timezone": zones[0]}, "high",
                [f"local clock with daylight saving: {evidence}; fits {zones[0]}"
                 + (f" (same offsets over the sample: {others})" if others else "")], [])
    changes = _common_changes_in_sample(naive)
    if changes:
        return ({"timezone": "UTC"}, "low",
                [f"no hour repeated or skipped where common zones change their clocks ({', '.join(changes[:3])})"],
                ["the clock keeps no daylight saving: is it UTC or a fixed offset (e.g. Etc/GMT-1 for UTC+1)?"])
    return ({"timezone": "UTC"}, "low", ["the sample spans no daylight-saving change"],
            ["which clock are the stamps on? the sample cannot tell (UTC assumed)"])


def draft_clock(table: pd.DataFrame, station_column: str | None, value_columns: list[str]) -> ClockDraft | None:
    """The time block for a table of text columns, or None when no column holds timestamps."""
    single = []
    for column in table.columns:
        formats = stamp_formats(table[column])
        if formats:
            single.append((column, formats))
    aware = [(c, f) for c, f in single if f[0][0] in ("iso8601", "epoch_s")]
    parts = find_parts(table)
    evidence, questions = [], []
    if aware:  # an offset in every stamp answers the zone outright: preferred over any local clock
        column, formats = aware[0]
        time = {"column": column, "format": formats[0][0]}
        others = [c for c, _ in single if c != column] + (list(parts.values()) if parts else [])
        evidence.append(f"every stamp carries its UTC offset ({formats[0][0]}): no time-zone question"
                        + (f"; also found: {', '.join(others)}" if others else ""))
        stamps = (pd.to_datetime(table[column].str.strip(), format="ISO8601", utc=True, errors="coerce")
                  if time["format"] == "iso8601" else
                  pd.to_datetime(pd.to_numeric(table[column], errors="coerce"), unit="s", utc=True))
        return ClockDraft(time, "high", evidence, questions, [column], others, modal_step(stamps))
    if single:
        column, formats = single[0]
        time = {"column": column, "format": formats[0][0]}
        ties = [f for f, share in formats[1:] if share == formats[0][1]]
        confidence = "high"
        if ties:
            confidence = "low"
            questions.append(f"{column}: {formats[0][0]} and {', '.join(ties)} both read every stamp "
                             f"(day and month never exceed 12): which is it?")
        naive = pd.to_datetime(table[column].str.strip(), format=formats[0][0], errors="coerce")
        columns = [column]
    elif parts:
        time = {"parts": parts}
        naive = pd.to_datetime(parts_text(table, parts), format="%Y-%m-%d %H:%M" if "minute" in parts
                               else "%Y-%m-%d %H", errors="coerce")
        confidence = "high"
        columns = list(parts.values())
    else:
        return None
    station = table[station_column] if station_column else pd.Series("", index=table.index)
    content = table[value_columns].astype(str).agg("\x1f".join, axis=1) if value_columns else station
    zone, zone_confidence, zone_evidence, zone_questions = answer_clock(naive, station, content)
    time.update(zone)
    questions += zone_questions + ["does a stamp name the hour's start or its end (label: end)? start assumed"]
    order = {"high": 2, "medium": 1, "low": 0}
    confidence = min(confidence, zone_confidence, key=order.get)
    return ClockDraft(time, confidence, evidence + zone_evidence, questions, columns, step=modal_step(naive))
