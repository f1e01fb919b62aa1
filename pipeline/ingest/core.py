"""Ingest one city: raw dump files -> canonical UTC table on the study's cadence + QC report.

Reads the files matched by the city's format (`files`, relative to `raw_dir`) and the station table;
`run_ingest` writes data/clean/<city>.parquet and data/qc/<city>.json atomically. Obeys the data-config
keys `cities.<city>` (the format dict, see formats.py; `cadence` and `completeness` as cadence.py
describes), `stations` and `reference_temperature_c`.

Each delivered row is either kept or dropped for exactly one reason (the first that applies, in the
order of DROP_REASONS); rows_read == rows_kept + sum(dropped_by_reason) always holds.
"""

from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.errors import InputError
from pipeline.ingest import cadence, jsonl, long_csv, qc, station_columns_csv, timeparse, wide_csv
from pipeline.atomic import write_json_atomic, write_parquet_atomic
from pipeline.ingest.formats import files_pattern, validate_format
from pipeline.ingest.values import parse_number_columns, parse_numbers, to_canonical
from pipeline.stations import load_stations, stations_of_city
from pipeline.units import conversion_to_canonical
from pipeline.variables import QC_MISSING, VARIABLE_NAMES, qc_column

READERS = {"wide_csv": wide_csv, "long_csv": long_csv, "jsonl": jsonl, "station_columns_csv": station_columns_csv}
DROP_REASONS = ("unparseable_record", "unknown_station", "variable_not_mapped", "unparseable_timestamp",
                "timestamp_outside_window", "exact_duplicate", "nonexistent_local_time",
                "ambiguous_local_time", "timestamp_off_the_step", "conflicting_duplicate")
# Each row's fate as a small integer: 0 kept, else the 1-based position of its drop reason.
REASON_CODE = {name: code for code, name in enumerate(DROP_REASONS, start=1)}


def matching_files(raw_dir, pattern: str) -> list[Path]:
    paths = sorted(p for p in Path(raw_dir).glob(pattern) if p.is_file())
    if not paths:
        raise InputError(f"no raw file matches '{pattern}'", file=str(Path(raw_dir) / pattern))
    return paths


def raw_files(raw_dir, city: str, fmt: dict) -> list[str]:
    """The raw files a city's format names, for the rule's input list.

    With no match it returns the pattern itself, so Snakemake reports one clear missing input instead of
    running an ingest job with nothing to read.
    """
    pattern = files_pattern(city, fmt)
    paths = sorted(str(p) for p in Path(raw_dir).glob(pattern) if p.is_file())
    return paths or [str(Path(raw_dir) / pattern)]


def _convert_wide(parsed: dict, kept: np.ndarray, spec: dict, temperature: float):
    """`parsed`: {variable: (numbers, flags)} over every delivered row, emptied as it is converted (so
    that the delivered and the converted values are not all held at once); `kept`: the mask of rows kept."""
    values, conversions = {}, {}
    for canonical in spec["columns"].values():
        conversion = conversion_to_canonical(canonical, spec["units"][canonical], temperature)
        numbers, flags = parsed.pop(canonical)
        values[canonical] = to_canonical(numbers[kept], flags[kept], canonical, conversion)
        conversions[canonical] = [{**conversion.as_record(), "values": int(kept.sum())}]
    return values, conversions


def _convert_long(kept: pd.DataFrame, spec: dict, temperature: float):
    """Convert per (variable, unit) group, then place each value on its row of one row per station and hour."""
    variable_codes, variables = pd.factorize(kept["variable"], sort=True)
    fallback_units = np.array([spec["units"].get(variable, "") for variable in variables], dtype=object)
    unit_text = kept["unit_raw"].where(kept["unit_raw"] != "", fallback_units[variable_codes])
    parsed, parsed_flags = parse_numbers(kept["value_raw"], spec)  # per cell, so once for every group
    numbers = np.full(len(kept), np.nan)
    flags = np.zeros(len(kept), dtype="int8")
    conversions: dict[str, list] = {}
    for (variable, unit), index in kept.groupby([kept["variable"], unit_text], sort=True).indices.items():
        try:
            conversion = conversion_to_canonical(variable, unit, temperature)
        except InputError as error:
            raise InputError(str(error).split(": ", 1)[-1], file=str(kept["file"].iloc[index[0]]),
                             row=int(kept["line"].iloc[index[0]]),
                             field=spec.get("unit_column", f"units.{variable}")) from None
        numbers[index], flags[index] = to_canonical(parsed[index], parsed_flags[index], variable, conversion)
        conversions.setdefault(variable, []).append({**conversion.as_record(), "values": int(len(index))})
    # (station, hour) pairs in sorted order, as a pivot gives them; (station, hour, variable) is unique here.
    station_codes, stations = pd.factorize(kept["station_id"], sort=True)
    hour_codes, hours = pd.factorize(kept["utc"], sort=True)
    pairs, pair_of_row = np.unique(station_codes.astype("int64") * len(hours) + hour_codes, return_inverse=True)
    keys = pd.DataFrame({"station_id": np.asarray(stations, dtype=object)[pairs // len(hours)],
                         "time": hours[pairs % len(hours)]})
    values = {}
    for code, variable in enumerate(variables):
        rows = variable_codes == code
        column_values, column_flags = np.full(len(pairs), np.nan), np.full(len(pairs), QC_MISSING, dtype="int8")
        column_values[pair_of_row[rows]], column_flags[pair_of_row[rows]] = numbers[rows], flags[rows]
        values[variable] = column_values, column_flags
    return keys, values, conversions


def _complete_grid(keys: pd.DataFrame, values: dict, step: pd.Timedelta) -> pd.DataFrame:
    """One row per station and step from its first to last delivered step; absent steps MISSING.

    Keys are unique and on the step (off-step rows and duplicates were dropped), so each delivered row
    has one place on its station's grid: the station's offset plus its steps since the station's first.
    """
    codes, stations = pd.factorize(keys["station_id"], sort=True)
    nanos = keys["time"].to_numpy("datetime64[ns]").view("int64")
    per_station = pd.Series(nanos).groupby(codes)
    first, last = per_station.min().to_numpy(), per_station.max().to_numpy()
    lengths = (last - first) // step.value + 1
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]])
    rows = int(lengths.sum())
    steps_in = np.arange(rows) - np.repeat(starts, lengths)
    station_of_row = np.repeat(np.arange(len(stations)), lengths)
    grid = {"station_id": pd.array(list(stations), dtype="string").take(station_of_row),
            "time": pd.to_datetime((np.repeat(first, lengths) + steps_in * step.value).view("datetime64[ns]"),
                                   utc=True)}
    place = starts[codes] + (nanos - first[codes]) // step.value
    for variable, (numbers, flags) in values.items():
        grid[variable] = np.full(rows, np.nan)
        grid[variable][place] = numbers
        grid[qc_column(variable)] = np.full(rows, QC_MISSING, dtype="int8")
        grid[qc_column(variable)][place] = flags
    return _with_every_variable(grid, values)  # in (station, time) order as built


def _with_every_variable(clean, delivered) -> pd.DataFrame:
    """The clean-table schema: every canonical variable and its QC column; undelivered ones MISSING.
    `clean`: a table or {column: array}; rows stay in the order given."""
    rows = len(clean["time"])
    columns = {"station_id": pd.array(clean["station_id"], dtype="string"),
               "time": pd.array(clean["time"], dtype="datetime64[ns, UTC]")}
    for variable in VARIABLE_NAMES:
        if variable in delivered:
            columns[variable] = np.asarray(clean[variable], dtype="float64")
            columns[qc_column(variable)] = np.asarray(clean[qc_column(variable)], dtype="int8")
        else:  # not delivered by this city
            columns[variable] = np.full(rows, np.nan)
            columns[qc_column(variable)] = np.full(rows, QC_MISSING, dtype="int8")
    return pd.DataFrame(columns, copy=False)  # the arrays are the table's own: no second copy of it in memory


def ingest_city(city: str, fmt: dict, raw_dir, stations: pd.DataFrame,
                reference_temperature_c: float = 25.0, *, config_file: str | None = None
                ) -> tuple[pd.DataFrame, dict]:
    """Read a city's raw dump and return (clean table, QC report dict). Writes nothing."""
    spec = validate_format(city, fmt, reference_temperature_c, config_file)
    paths = matching_files(raw_dir, spec["files"])
    raw = READERS[spec["layout"]].read(paths, spec)
    frame = raw.frame.reset_index(drop=True)
    reason = np.zeros(len(frame), dtype="int8")
    known = set(stations_of_city(stations, city)["station_id"])

    def active():
        return reason == 0

    # a missing code keeps a code of its own (the default -1 would take() the last delivered station)
    station_codes, delivered_codes = pd.factorize(frame["station_raw"], use_na_sentinel=False)
    mapped = pd.array([spec["station_map"].get(code, code) for code in delivered_codes], dtype="str")
    frame["station_id"] = mapped.take(station_codes)
    unknown = ~frame["station_id"].isin(known).to_numpy()
    reason[unknown] = REASON_CODE["unknown_station"]
    series_keys = ["station_id"]
    if raw.long:
        frame["variable"] = frame["variable_raw"].map(spec["variables"])
        reason[active() & frame["variable"].isna().to_numpy()] = REASON_CODE["variable_not_mapped"]
        series_keys.append("variable")
        value_columns = ["value_raw", "unit_raw"]
    else:
        value_columns = list(spec["columns"].values())
    parsed = timeparse.parse_text(frame["time_raw"], spec["time"])
    reason[active() & parsed.isna().to_numpy()] = REASON_CODE["unparseable_timestamp"]
    window = timeparse.window_bounds(spec["time"])
    reason[active() & timeparse.outside_window(parsed, window)] = REASON_CODE["timestamp_outside_window"]
    exact = qc.mark_exact_duplicates(frame, active(), [*series_keys, "time_raw"], value_columns)
    reason[exact] = REASON_CODE["exact_duplicate"]
    if not raw.long:  # the values' text has served (exact duplicates): numbers take far less memory
        parsed_values = parse_number_columns({column: frame[column] for column in value_columns}, spec)
        frame = frame.drop(columns=value_columns)

    if timeparse.is_aware(parsed):
        utc = parsed.where(active())  # dropped stamps may lie outside what nanoseconds can hold
        dst = {"timezone": "offset given in every timestamp", "ambiguous_rows": 0,
               "nonexistent_rows_dropped": 0}
    else:
        utc = pd.Series(pd.NaT, index=frame.index, dtype="datetime64[ns, UTC]")
        rows = active()
        local_utc, time_reason, dst = timeparse.localize_to_utc(
            parsed[rows], frame.loc[rows, series_keys], spec["time"])
        utc[rows] = local_utc.astype("datetime64[ns, UTC]")
        late = time_reason != ""
        reason[np.flatnonzero(rows)[late.to_numpy()]] = time_reason[late].map(REASON_CODE).to_numpy()
    dst["hour_label"] = spec["time"]["label"]
    study_step = cadence.parse_cadence(spec["cadence"])
    step = cadence.delivered_step(utc.where(active()), frame[series_keys]) or study_step
    if study_step < step:
        raise InputError(f"cadence {spec['cadence']} is finer than the delivery's step "
                         f"{cadence.cadence_label(step)}: no rule makes values finer; declare "
                         f"{cadence.cadence_label(step)} or coarser", file=config_file or "data config",
                         field=f"cities.{city}.cadence")
    frame["utc"] = timeparse.apply_label(utc, spec["time"], step).astype("datetime64[ns, UTC]")
    reason[active() & timeparse.outside_window(frame["utc"], window)] = REASON_CODE["timestamp_outside_window"]
    off_step = frame["utc"].notna() & (frame["utc"] != frame["utc"].dt.floor(step))
    reason[active() & off_step.to_numpy()] = REASON_CODE["timestamp_off_the_step"]
    losers, conflict_groups = qc.mark_conflicting_duplicates(frame, active(), ["utc", *series_keys],
                                                             spec["duplicates"])
    reason[losers] = REASON_CODE["conflicting_duplicate"]

    kept = frame.loc[active(), list(frame.columns) if raw.long else ["station_id", "utc"]].reset_index(drop=True)
    if kept.empty:  # never hand an empty table to the splits and training
        if len(frame) + raw.pre_dropped.get("unparseable_record", 0) == 0:
            raise InputError(f"no data row in {len(paths)} delivered file(s)", file=str(paths[0]),
                             row=spec["header_line"] + 1 if spec["layout"] != "jsonl" else 1,
                             field="rows")
        raise InputError(f"no usable row for city {city}: every row was dropped "
                         f"({qc.top_codes(pd.Series(np.array(DROP_REASONS)[reason[reason != 0] - 1]))}, "
                         f"see unparseable_record too)",
                         file=str(paths[0]), field="rows")
    if raw.long:
        keys, values, conversions = _convert_long(kept, spec, reference_temperature_c)
    else:
        keys = kept[["station_id", "utc"]].rename(columns={"utc": "time"})
        values, conversions = _convert_wide(parsed_values, active(), spec, reference_temperature_c)
    clean = _complete_grid(keys, values, step)
    aggregation = None
    if study_step > step:
        clean, aggregation = cadence.aggregate(clean, sorted(values), step, study_step, spec["completeness"])
        clean = _with_every_variable(clean, values).sort_values(["station_id", "time"], ignore_index=True)

    tally = np.bincount(reason, minlength=len(DROP_REASONS) + 1)

    def dropped_for(name: str) -> np.ndarray:
        return reason == REASON_CODE[name]

    dropped = {name: int(tally[code]) for name, code in REASON_CODE.items()}
    dropped["unparseable_record"] = raw.pre_dropped.get("unparseable_record", 0)
    rows_read = len(frame) + dropped["unparseable_record"]
    report = {
        "city": city, "layout": spec["layout"], "format": spec,
        "reference_temperature_c": float(reference_temperature_c),
        "files": raw.files,
        "rows": {"read": rows_read, "kept": int(len(kept)), "dropped": rows_read - int(len(kept)),
                 "dropped_by_reason": dropped},
        "duplicates": {"exact_rows_dropped": dropped["exact_duplicate"],
                       "conflicting_keys": conflict_groups,
                       "conflicting_rows_dropped": dropped["conflicting_duplicate"],
                       "resolution": ("kept the last row in delivery order (files by name, then lines)"
                                      if spec["duplicates"] == "keep_last" else
                                      "kept the first row in delivery order (files by name, then lines)")},
        "time_window": {"earliest": spec["time"]["earliest"],
                        "latest": spec["time"]["latest"] or "time of ingestion",
                        "rows_dropped": dropped["timestamp_outside_window"],
                        "stamps": qc.top_codes(frame.loc[dropped_for("timestamp_outside_window"), "time_raw"])},
        "unknown_station_codes": qc.top_codes(frame.loc[dropped_for("unknown_station"), "station_raw"]),
        "unmapped_variable_codes": (qc.top_codes(frame.loc[dropped_for("variable_not_mapped"), "variable_raw"])
                                    if raw.long else {}),
        "dst": dst,
        "cadence": {"study": spec["cadence"], "delivered": cadence.cadence_label(step),
                    "aggregation": aggregation},
        "conversions": conversions,
        "variables_delivered": sorted(values),
        "variables_not_delivered": [v for v in VARIABLE_NAMES if v not in values],
        "values": qc.flag_counts(clean, VARIABLE_NAMES),
        "stations_without_data": sorted(known - set(clean["station_id"].unique())),
        **qc.series_notes(clean, sorted(values)),
        "gaps": {station: qc.station_gaps(times, step)
                 for station, times in kept["utc"].groupby(kept["station_id"], sort=True)},
        "clean_rows": int(len(clean)),
    }
    assert report["rows"]["dropped"] == sum(dropped.values()), "every dropped row has one reason"
    return clean, report


def run_ingest(city: str, fmt: dict, raw_dir, stations_csv, out_parquet, out_qc,
               reference_temperature_c: float = 25.0, *, config_file: str | None = None) -> dict:
    """Ingest one city and write its clean Parquet table and QC JSON atomically; return the QC dict."""
    stations = load_stations(stations_csv)
    clean, report = ingest_city(city, fmt, raw_dir, stations, reference_temperature_c,
                                config_file=config_file)
    report["stations_table"] = str(stations_csv)
    report["outputs"] = {"parquet": str(out_parquet), "qc": str(out_qc)}
    write_parquet_atomic(clean, out_parquet)
    write_json_atomic(report, out_qc)
    return report
