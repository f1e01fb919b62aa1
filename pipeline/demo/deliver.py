"""Turn one city's simulated canonical table into raw dump files in that city's own format, with the
defects real deliveries have (gaps, an outage, sentinels, impossible values, unparseable cells, exact
and conflicting duplicate rows, an unknown station, a logger stamp in the skipped spring hour, a
truncated JSON line).

Reads nothing; returns {relative path: file text} and a record of every injected defect, so tests can
predict what ingestion must count. Obeys the city's validated format dict (see pipeline.ingest.formats).
"""

import fnmatch
import json
from pathlib import PurePosixPath

import numpy as np
import pandas as pd

from pipeline.demo.defects import inject_defects
from pipeline.errors import InputError
from pipeline.units import conversion_to_canonical
from pipeline.variables import BY_NAME

DECIMALS = {"pm25": 1, "pm10": 1, "no2": 1, "o3": 1, "so2": 1, "co": 3, "temp_c": 1, "rh_pct": 1,
            "wind_speed_ms": 1, "wind_dir_deg": 0, "pressure_hpa": 1, "precip_mm": 1, "aux": 1}
_SUFFIX = {"wide_csv": ".csv", "long_csv": ".csv", "jsonl": ".jsonl"}


def _long_unit(variable: str, station_position: int) -> str:
    """Long dumps: even-numbered stations report gases as mixing ratios, the others as mass."""
    if variable in ("no2", "o3", "so2"):
        return "ppb" if station_position % 2 == 0 else "ug/m3"
    if variable == "co":
        return "ppm" if station_position % 2 == 0 else "mg/m3"
    return BY_NAME[variable].unit


def _text(values: np.ndarray, decimals: int, decimal: str) -> np.ndarray:
    text = np.char.mod(f"%.{decimals}f", np.round(values, decimals))
    text = np.where(np.isnan(values), "", text)
    return np.char.replace(text, ".", decimal) if decimal != "." else text


def _time_texts(utc: pd.Series, spec: dict) -> dict[str, np.ndarray]:
    """Timestamp column(s) as the city writes them."""
    time = spec["time"]
    stamp = utc + pd.Timedelta(hours=1) if time["label"] == "end" else utc
    if time["format"] == "epoch_s":
        return {time["column"]: (stamp.astype("int64") // 10**9).astype(str).to_numpy()}
    local = stamp.dt.tz_convert(time["timezone"])
    if time["format"] == "iso8601":
        return {time["column"]: local.map(lambda t: t.isoformat()).to_numpy()}
    if "parts" in time:
        parts = time["parts"]
        return {parts["year"]: local.dt.year.astype(str).to_numpy(),
                parts["month"]: local.dt.month.astype(str).to_numpy(),
                parts["day"]: local.dt.day.astype(str).to_numpy(),
                parts["hour"]: local.dt.hour.astype(str).to_numpy()}
    return {time["column"]: local.dt.strftime(time["format"]).to_numpy()}


def _remove_gaps(truth: pd.DataFrame, rng) -> tuple[pd.DataFrame, dict]:
    """Drop short gaps at every station and one multi-day outage at one station; edges stay intact."""
    keep = np.ones(len(truth), dtype=bool)
    stats = {}
    stations = list(dict.fromkeys(truth["station_id"]))
    outage_station = stations[int(rng.integers(len(stations)))]
    for station in stations:
        rows = np.flatnonzero(truth["station_id"].to_numpy() == station)
        hours = len(rows)
        removed = np.zeros(hours, dtype=bool)
        if hours >= 72:
            for _ in range(max(1, hours // 500)):
                length = int(rng.integers(1, 7))
                begin = int(rng.integers(24, hours - 24 - length))
                removed[begin:begin + length] = True
            if station == outage_station:
                length = int(np.clip(hours // 10, 6, 96))
                begin = int(rng.integers(24, hours - 24 - length))
                removed[begin:begin + length] = True
        keep[rows[removed]] = False
        runs = np.diff(np.concatenate([[0], removed.astype(int), [0]]))
        lengths = np.flatnonzero(runs == -1) - np.flatnonzero(runs == 1)
        stats[station] = {"missing_hours": int(removed.sum()),
                          "longest_gap_hours": int(lengths.max()) if len(lengths) else 0}
    return truth[keep].reset_index(drop=True), stats


def _records(kept: pd.DataFrame, spec: dict, reference_temperature_c: float, code_of: dict):
    """Delivered records as text: (table, value columns, variable of each value cell or column)."""
    times = _time_texts(kept["time"], spec)
    station = kept["station_id"].map(code_of).to_numpy()
    decimal = spec["decimal"]
    if spec["layout"] != "long_csv":
        table = pd.DataFrame({spec["station_column"]: station, **times})
        for raw_name, variable in spec["columns"].items():
            conversion = conversion_to_canonical(variable, spec["units"][variable], reference_temperature_c)
            table[raw_name] = _text(conversion.invert(kept[variable].to_numpy(float)), DECIMALS[variable],
                                    decimal)
        return table, list(spec["columns"]), dict(zip(spec["columns"], spec["columns"].values()))
    position = {s: i for i, s in enumerate(dict.fromkeys(kept["station_id"]))}
    station_position = kept["station_id"].map(position).to_numpy()
    pieces = []
    for code, variable in spec["variables"].items():
        units = np.array([_long_unit(variable, p) for p in range(len(position))])[station_position]
        values = kept[variable].to_numpy(float).copy()
        for unit in np.unique(units):
            mask = units == unit
            values[mask] = conversion_to_canonical(variable, unit, reference_temperature_c).invert(values[mask])
        piece = pd.DataFrame({spec["station_column"]: station, **times, spec["variable_column"]: code,
                              spec["value_column"]: _text(values, DECIMALS[variable], decimal),
                              "_order": np.arange(len(kept))})
        if "unit_column" in spec:
            piece[spec["unit_column"]] = units
        pieces.append(piece)
    table = pd.concat(pieces, ignore_index=True).sort_values("_order", kind="stable").drop(columns="_order")
    return table.reset_index(drop=True), [spec["value_column"]], None


def render_city(truth: pd.DataFrame, city: str, spec: dict, rng, reference_temperature_c: float = 25.0
                ) -> tuple[dict[str, str], dict]:
    """({relative path: text}, record of what was injected and what ingestion should find)."""
    kept, gap_stats = _remove_gaps(truth, rng)
    code_of = {v: k for k, v in spec["station_map"].items()}
    code_of = {s: code_of.get(s, s) for s in kept["station_id"].unique()}
    table, value_columns, variable_of_column = _records(kept, spec, reference_temperature_c, code_of)
    month = kept["time"].dt.strftime("%Y-%m").to_numpy()
    if spec["layout"] == "long_csv":  # each station-hour became one record per variable, in a row
        month = np.repeat(month, len(spec["variables"]))
    table["_month"] = month
    table["_station"] = table[spec["station_column"]]
    table["_order"] = np.arange(len(table), dtype=float)
    utc_range = (truth["time"].min(), truth["time"].max())
    table, injected = inject_defects(table, spec, value_columns, variable_of_column, rng, utc_range)
    table = table.sort_values("_order", kind="stable").reset_index(drop=True)
    files = _split_files(table, city, spec)
    injected["records_written"] = int(len(table))
    injected["expected_rows_kept"] = injected["records_written"] - sum(
        injected[k] for k in ("exact_duplicate", "conflicting_duplicate", "unknown_station",
                              "nonexistent_local_time", "unparseable_record"))
    injected["stations"] = gap_stats
    return files, injected


def _split_files(table: pd.DataFrame, city: str, spec: dict) -> dict[str, str]:
    """CSV layouts: one file per UTC month; jsonl: one file per station. Names must match `files`."""
    pattern = spec["files"]
    folder = PurePosixPath(pattern).parent
    suffix = _SUFFIX[spec["layout"]]
    key = "_station" if spec["layout"] == "jsonl" else "_month"
    files = {}
    for part, group in table.groupby(key, sort=True):
        name = str(folder / f"{city}_{str(part).lower()}{suffix}")
        if not fnmatch.fnmatch(name, pattern):
            raise InputError(f"the demo generator writes files like '{name}', which the pattern does "
                             f"not match", field=f"cities.{city}.files")
        body = group.drop(columns=["_month", "_station", "_order", "_truncated"], errors="ignore")
        if spec["layout"] == "jsonl":
            files[name] = _jsonl_text(body, spec, group.get("_truncated"))
        else:
            preamble = "".join(f"# {city} station export, line {i + 1} of the preamble\n"
                               for i in range(spec["header_line"] - 1))
            files[name] = preamble + body.to_csv(sep=spec["separator"], index=False, lineterminator="\n")
    return files


def _json_value(text: str, decimal: str):
    if text == "":
        return None
    try:
        return float(text.replace(decimal, "."))
    except ValueError:
        return text  # an unparseable cell stays text, as the agency sent it


def _jsonl_text(body: pd.DataFrame, spec: dict, truncated) -> str:
    lines = []
    for position, row in enumerate(body.to_dict("records")):
        record = {spec["station_column"]: row[spec["station_column"]],
                  spec["time"]["column"]: row[spec["time"]["column"]]}
        for path, _ in spec["columns"].items():
            target = record
            *parents, leaf = path.split(".")
            for parent in parents:
                target = target.setdefault(parent, {})
            target[leaf] = _json_value(row[path], spec["decimal"])
        line = json.dumps(record, separators=(",", ":"))
        if truncated is not None and bool(truncated.iloc[position]):
            line = line[: len(line) // 2]  # a line cut off mid-record, as after a failed upload
        lines.append(line)
    return "\n".join(lines) + "\n"
