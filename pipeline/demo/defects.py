"""Delivery defects injected into a city's rendered records (text table), each one counted.

Reads and writes nothing. Works on the text table built by deliver.py: one row per delivered record,
helper columns `_order` (delivery position; copies get fractional positions right after their source
row), `_station`, `_month`. Rows at a repeated autumn local hour are left untouched so the DST pairing
stays clean and every injected defect has exactly one predictable outcome in ingestion.
"""

import numpy as np
import pandas as pd

IMPOSSIBLE = {"pm25": -5.0, "rh_pct": 130.0}  # impossible in any unit the demo delivers
UNKNOWN_STATION_CODE = "TEST99"
UNPARSEABLE_TEXT = "ERR"


def _number_text(value: float, decimal: str) -> str:
    text = str(int(value)) if float(value).is_integer() else repr(float(value))
    return text.replace(".", decimal)


def _time_columns(spec: dict) -> list[str]:
    time = spec["time"]
    return [time["column"]] if "column" in time else list(time["parts"].values())


class _Picker:
    """Draws distinct rows not yet used for another defect (and not protected)."""

    def __init__(self, protected: np.ndarray, rng):
        self.used = protected.copy()
        self.rng = rng

    def pick(self, count: int, allowed: np.ndarray | None = None) -> np.ndarray:
        mask = ~self.used if allowed is None else (~self.used & allowed)
        candidates = np.flatnonzero(mask)
        chosen = self.rng.choice(candidates, size=min(count, len(candidates)), replace=False)
        self.used[chosen] = True
        return np.sort(chosen)


def _nonexistent_hour(spec: dict, utc_range) -> pd.Timestamp | None:
    """First local clock hour skipped by a spring DST change inside the data, if the format has one."""
    time = spec["time"]
    if time["format"] in ("iso8601", "epoch_s"):
        return None
    first, last = (t.tz_convert(time["timezone"]).tz_localize(None) for t in utc_range)
    naive = pd.Series(pd.date_range(first.floor("h"), last.floor("h"), freq="h"))
    localized = naive.dt.tz_localize(time["timezone"], ambiguous="NaT", nonexistent="NaT")
    skipped = naive[localized.isna() & ~naive.duplicated(keep=False)]
    # Ambiguous hours are NaT too; a skipped hour is one whose shifted form differs from itself.
    shifted = skipped.dt.tz_localize(time["timezone"], ambiguous=True, nonexistent="NaT")
    skipped = skipped[shifted.isna()]
    return skipped.iloc[0] if len(skipped) else None


def inject_defects(table: pd.DataFrame, spec: dict, value_columns: list[str], variable_of_column,
                   rng, utc_range) -> tuple[pd.DataFrame, dict]:
    """Return (table with defects, counts). `variable_of_column` is None for long layouts."""
    long = variable_of_column is None
    decimal = spec["decimal"]
    series = [spec["station_column"], *_time_columns(spec)] + ([spec["variable_column"]] if long else [])
    picker = _Picker(table.duplicated(series, keep=False).to_numpy(), rng)
    rows = len(table)
    variable_codes = table[spec["variable_column"]].map(spec["variables"]) if long else None

    def variable(row, column):
        return variable_codes.iat[row] if long else variable_of_column[column]

    counts = {"sentinel_values": {}, "out_of_range_values": {}, "unparseable_values": {}}

    def mark(kind, row, column, text):
        table.iat[row, table.columns.get_loc(column)] = text
        name = variable(row, column)
        counts[kind][name] = counts[kind].get(name, 0) + 1

    if spec["sentinels"]:
        for row in picker.pick(max(1, round(0.003 * rows))):
            column = value_columns[int(rng.integers(len(value_columns)))]
            mark("sentinel_values", row, column, _number_text(spec["sentinels"][0], decimal))
    for name, impossible in IMPOSSIBLE.items():
        if long:
            allowed = (variable_codes == name).to_numpy()
            column = spec["value_column"]
        else:
            column = next((c for c, v in variable_of_column.items() if v == name), None)
            allowed = np.ones(rows, dtype=bool)
        if column is None or not allowed.any():
            continue
        for row in picker.pick(max(1, round(0.0002 * allowed.sum())), allowed):
            mark("out_of_range_values", row, column, _number_text(impossible, decimal))
    for row in picker.pick(max(1, round(0.0001 * rows))):
        column = value_columns[int(rng.integers(len(value_columns)))]
        mark("unparseable_values", row, column, UNPARSEABLE_TEXT)

    extra = []
    exact = picker.pick(max(1, round(0.002 * rows)))
    for row in exact:
        copy = table.iloc[row].copy()
        copy["_order"] += 0.5
        extra.append(copy)
    conflicting = 0
    for row in picker.pick(max(1, round(0.0003 * rows))):
        copy = table.iloc[row].copy()
        for column in rng.permutation(value_columns):
            old = copy[column]
            decimals = len(old.split(decimal)[1]) if decimal in old else 0
            value = float(old.replace(decimal, ".")) * 0.9  # shrinking keeps every value in range
            new = f"{value:.{decimals}f}".replace(".", decimal)
            if new != old:
                copy[column] = new
                copy["_order"] += 0.6
                extra.append(copy)
                conflicting += 1
                break
    template = picker.pick(1)[0]
    unknown = table.iloc[template].copy()
    unknown[spec["station_column"]] = UNKNOWN_STATION_CODE
    unknown["_order"] += 0.3
    extra.append(unknown)
    skipped = _nonexistent_hour(spec, utc_range)
    if skipped is not None:
        ghost = table.iloc[picker.pick(1)[0]].copy()
        time = spec["time"]
        if "parts" in time:
            for part, column in time["parts"].items():
                ghost[column] = str(getattr(skipped, part))
        else:
            ghost[time["column"]] = skipped.strftime(time["format"])
        ghost["_order"] += 0.4
        extra.append(ghost)
    truncated = 0
    if spec["layout"] == "jsonl":
        cut = table.iloc[picker.pick(1)[0]].copy()
        cut["_order"] = table["_order"].max() + 1.0
        cut["_truncated"] = True
        extra.append(cut)
        truncated = 1
    if extra:
        table = pd.concat([table, pd.DataFrame(extra)], ignore_index=True)
    if "_truncated" in table:
        table["_truncated"] = table["_truncated"].fillna(False).astype(bool)
    counts.update(exact_duplicate=len(exact), conflicting_duplicate=conflicting, unknown_station=1,
                  nonexistent_local_time=int(skipped is not None), unparseable_record=truncated,
                  skipped_local_hour=None if skipped is None else skipped.isoformat())
    return table, counts
