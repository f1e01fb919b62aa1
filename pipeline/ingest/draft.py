"""Draft a new city's format dict from a sample of its raw dump, for a person to review.

Reads the given dump files as text (every record of each, up to `max_rows` per file); writes nothing.
Proposes the keys of a format dict (pipeline.ingest.formats): layout, files, encoding, separator,
decimal, header_line, station_column, time (pipeline.ingest.draft_clock), columns / variables,
units, sentinels, each with a confidence (high: read from the data; medium: likely; low: a guess to
check) and the questions the data cannot answer; columns and units come from
pipeline.ingest.draft_columns. `render` writes the draft as a data-config YAML block whose comments carry
the confidences, evidence and questions.
"""

from __future__ import annotations

import csv
import io
import json
import re
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
import yaml

from pipeline.errors import InputError, one_line
from pipeline.ingest.draft_clock import ClockDraft, draft_clock
from pipeline.ingest.draft_columns import (Entry, by_values, find_sentinels, guess_unit, is_numeric, long_columns,
                                           match_variable, numbers_of, station_column, unit_in_name)
from pipeline.ingest.raw import read_csv_text
from pipeline.textfile import read_text
from pipeline.units import conversion_to_canonical
from pipeline.variables import BY_NAME

SEPARATORS = (",", ";", "\t", "|")


@dataclass
class Draft:
    city: str
    entries: dict[str, Entry] = field(default_factory=dict)  # format key -> proposal, in format order
    mapping: dict[str, Entry] = field(default_factory=dict)  # column / code -> canonical variable
    units: dict[str, Entry] = field(default_factory=dict)  # canonical variable -> delivered unit
    unmapped: dict[str, str] = field(default_factory=dict)  # column / code -> what its values look like
    clock: ClockDraft | None = None
    station_codes: dict[str, int] = field(default_factory=dict)
    questions: list[str] = field(default_factory=list)
    rows_sampled: int = 0
    files: list[str] = field(default_factory=list)

    def block(self) -> dict:
        """The proposed format dict (what goes under `data.cities.<city>`)."""
        block = {key: entry.value for key, entry in self.entries.items()}
        block["time"] = dict(self.clock.time)
        mapped = {raw: entry.value for raw, entry in self.mapping.items()}
        if block["layout"] != "station_columns_csv":
            block["variables" if block["layout"] == "long_csv" else "columns"] = mapped
        if self.units:
            block["units"] = {variable: entry.value for variable, entry in self.units.items()}
        return block


# -- reading the sample ------------------------------------------------------------------------------

def _encoding(path: Path) -> str:
    try:
        read_text(path, "utf-8")
        return "utf-8"
    except InputError:
        return "latin-1"  # every byte decodes; the reviewer checks accents in codes and units


def sniff_csv(text: str, path: Path) -> tuple[str, int]:
    """(separator, header line number): the separator that splits most records into one equal number of
    fields (read as CSV, so a quoted field may hold separators and line ends); the header is the first
    record with that number of fields (lines before it are a preamble)."""
    best = None
    for separator in SEPARATORS:
        reader = csv.reader(io.StringIO(text[:200_000], newline=""), delimiter=separator)
        starts, counts, previous = [], [], 0
        try:
            for record in reader:
                if any(field.strip() for field in record):
                    starts.append(previous + 1)
                    counts.append(len(record))
                previous = reader.line_num
                if len(counts) >= 200:
                    break
        except csv.Error:
            continue
        if not counts:
            continue
        modal = int(pd.Series(counts).mode().iloc[0])
        share = counts.count(modal) / len(counts)
        if modal > 1 and (best is None or (share, modal) > best[2:]):
            best = (separator, starts[counts.index(modal)], share, modal)
    if best is None:
        raise InputError("no delimiter splits the lines into columns (tried , ; tab |)", file=str(path),
                         field="separator")
    return best[0], best[1]


def _decimal(table: pd.DataFrame, separator: str) -> str:
    """A comma decimal mark shows as digits,digits in cells when the separator is not a comma."""
    if separator == ",":
        return "."
    cells = pd.concat([table[c] for c in table.columns if c != "line"], ignore_index=True).astype(str).str.strip()
    comma = cells.str.fullmatch(r"-?\d+,\d+").sum()
    point = cells.str.fullmatch(r"-?\d+\.\d+").sum()
    return "," if comma > point else "."


def _flatten(record: dict, prefix: str = "") -> dict:
    flat = {}
    for key, value in record.items():
        path = f"{prefix}{key}"
        if isinstance(value, dict):
            flat.update(_flatten(value, path + "."))
        else:
            flat[path] = "" if value is None else str(value)
    return flat


def _read_jsonl(paths: list[Path], encoding: str, max_rows: int) -> pd.DataFrame:
    rows = []
    for path in paths:
        taken = 0
        for line in read_text(path, encoding).split("\n"):
            if taken >= max_rows:
                break
            try:
                record = json.loads(line) if line.strip() else None
            except (json.JSONDecodeError, RecursionError):
                record = None  # a broken line: ingestion counts these, the draft skips them
            if isinstance(record, dict):
                rows.append(_flatten(record))
                taken += 1
    return pd.DataFrame(rows).fillna("").astype(str)


def read_sample(paths: list[Path], max_rows: int) -> tuple[pd.DataFrame, dict[str, Entry]]:
    """The sample as a table of text columns, and the reading keys proposed (layout guess, CSV keys)."""
    encoding = _encoding(paths[0])
    text = read_text(paths[0], encoding)
    entries = {"encoding": Entry(encoding, "high" if encoding == "utf-8" else "low",
                                 "" if encoding == "utf-8" else "not UTF-8: latin-1 reads every byte, check it")}
    first = next((line.strip() for line in text.split("\n") if line.strip()), "")
    if not first:
        raise InputError("the file is empty", file=str(paths[0]), row=1)
    if first.startswith("{"):
        entries["layout"] = Entry("jsonl", "high", "one JSON object per line")
        return _read_jsonl(paths, encoding, max_rows), entries
    separator, header = sniff_csv(text, paths[0])
    spec = {"separator": separator, "header_line": header, "encoding": encoding}
    tables = [read_csv_text(path, spec).table.head(max_rows) for path in paths]
    table = pd.concat(tables, ignore_index=True).drop(columns="line")
    entries["separator"] = Entry(separator, "high", "splits every line into the header's fields")
    entries["decimal"] = Entry(_decimal(table, separator), "high")
    entries["header_line"] = Entry(header, "high" if header == 1 else "medium",
                                   "" if header == 1 else f"{header - 1} preamble line(s) before the header")
    return table, entries


# -- columns --------------------------------------------------------------------------------------------

def _map_wide(draft: Draft, table: pd.DataFrame, columns: list[str], decimal: str) -> None:
    for column in columns:
        numbers = numbers_of(table[column], decimal)
        variable, confidence = match_variable(column)
        why = "named so"
        if variable is None:
            variable, why = by_values(numbers)
            confidence = "low"
        if variable is None or variable in {e.value for e in draft.mapping.values()}:
            draft.unmapped[column] = why if variable is None else f"also looks like {variable}"
            continue
        draft.mapping[column] = Entry(variable, confidence, why)
        _, written = unit_in_name(column)
        unit = Entry(written, "high", "written in the column name") if written else guess_unit(variable, numbers)
        try:
            conversion_to_canonical(variable, unit.value)
        except InputError:
            unit = Entry(BY_NAME[variable].unit, "low", f"{unit.value} cannot be converted: canonical assumed")
        draft.units[variable] = unit


def _map_long(draft: Draft, table: pd.DataFrame, long: dict, decimal: str) -> None:
    codes = table[long["variable_column"]].str.strip()
    for code in sorted(codes.unique()):
        variable, confidence = match_variable(code)
        if variable is None or variable in {e.value for e in draft.mapping.values()}:
            draft.unmapped[code] = f"{int((codes == code).sum())} rows"
            continue
        draft.mapping[code] = Entry(variable, confidence, "named so")
        if "unit_column" not in long:
            draft.units[variable] = guess_unit(variable, numbers_of(table.loc[codes == code, long["value_column"]],
                                                                   decimal))


# -- the draft ---------------------------------------------------------------------------------------------

def files_pattern(paths: list[Path], raw_dir: Path) -> str:
    """The `files` glob: the files' folder relative to raw_dir, and their common suffix."""
    folder = paths[0].resolve().parent
    try:
        relative = folder.relative_to(Path(raw_dir).resolve()).as_posix()
    except ValueError:
        relative = folder.name
    suffixes = {p.suffix for p in paths}
    return f"{relative}/*{suffixes.pop() if len(suffixes) == 1 else ''}"


def draft_format(paths: list[Path], city: str, raw_dir: Path | str = "data/raw", max_rows: int = 200_000) -> Draft:
    """Propose a format dict for the dump files `paths` (read as text, nothing written)."""
    paths = sorted(Path(p) for p in paths)
    if not paths:
        raise InputError("no dump file given", field="files")
    table, reading = read_sample(paths, max_rows)
    if table.empty:
        raise InputError("no record in the sample", file=str(paths[0]))
    decimal = reading["decimal"].value if "decimal" in reading else "."
    draft = Draft(city, rows_sampled=len(table), files=[str(p) for p in paths])
    draft.entries["layout"] = reading.pop("layout", Entry("wide_csv", "high"))
    draft.entries["files"] = Entry(files_pattern(paths, Path(raw_dir)), "high")
    for key in ("encoding", "separator", "decimal", "header_line"):
        if key in reading:
            draft.entries[key] = reading[key]
    station, station_confidence = station_column(table, set(), decimal)
    # The clock is drafted after the station (its DST test compares stations), the columns after both.
    clock = draft_clock(table, station, [c for c in table.columns if c != station])
    if clock is None:
        raise InputError("no column holds timestamps in a known format, and no year/month/day/hour columns",
                         file=str(paths[0]), field="time")
    draft.clock = clock
    used = set(clock.columns) | set(clock.spare)
    station, station_confidence = station_column(table, used, decimal)
    if station is None and draft.entries["layout"].value != "jsonl":
        _station_columns(draft, table, [c for c in table.columns if c not in used], decimal, paths)
        return _finish(draft, table, draft.entries["station_columns"].value, decimal)
    if station is None:
        raise InputError("no text field could hold the station code", file=str(paths[0]), field="station_column")
    draft.entries["station_column"] = Entry(station, station_confidence)
    draft.station_codes = {str(k): int(v) for k, v in table[station].str.strip().value_counts().head(30).items()}
    used.add(station)
    long = long_columns(table, used, decimal) if draft.entries["layout"].value != "jsonl" else None
    if long:
        draft.entries["layout"] = Entry("long_csv", "high", f"{long['variable_column']} names a variable on each row")
        for key, column in long.items():
            draft.entries[key] = Entry(column, "high" if key != "value_column" else "medium")
        _map_long(draft, table, long, decimal)
        value_columns = [long["value_column"]]
    else:
        value_columns = [c for c in table.columns if c not in used]
        _map_wide(draft, table, [c for c in value_columns if is_numeric(table[c], decimal)], decimal)
        for column in value_columns:
            if column not in draft.mapping and column not in draft.unmapped:
                draft.unmapped[column] = "not numbers"
    return _finish(draft, table, value_columns, decimal)


def _station_columns(draft: Draft, table: pd.DataFrame, columns: list[str], decimal: str, paths: list[Path]) -> None:
    """No column holds a station code: one column per station (layout station_columns_csv), one variable,
    named by the file name when it can be (nox_2004.csv) and asked otherwise."""
    numeric = [c for c in columns if is_numeric(table[c], decimal)]
    if len(numeric) < 2 or any(match_variable(c)[0] for c in numeric):
        raise InputError("no text column could hold the station code", file=str(paths[0]), field="station_column")
    draft.entries["layout"] = Entry("station_columns_csv", "medium", "no station column; number columns "
                                    "named like sites, not variables: one column per station")
    draft.entries["station_columns"] = Entry(numeric, "medium")
    draft.station_codes = {c: int((table[c].str.strip() != "").sum()) for c in numeric}
    words = [w for p in paths for w in re.split(r"[^A-Za-z0-9.]+", p.stem) if w]
    variable = next((v for v, _ in map(match_variable, words) if v), None)
    if variable is None:
        draft.entries["variable"] = Entry(None, "low", "which variable do the cells hold?")
        draft.questions.append("which variable do the station columns hold? (variable: ...)")
        return
    draft.entries["variable"] = Entry(variable, "medium", "named in the file name")
    values = pd.concat([numbers_of(table[c], decimal) for c in numeric], ignore_index=True)
    draft.units[variable] = guess_unit(variable, values)


def _finish(draft: Draft, table: pd.DataFrame, value_columns: list[str], decimal: str) -> Draft:
    """No-data codes, the cadence when it is not hourly, and the questions."""
    sentinels = find_sentinels(table, value_columns, decimal)
    if sentinels:
        draft.entries["sentinels"] = Entry(sentinels, "medium", "no-data codes found among the values")
    step = draft.clock.step
    if step is not None and step != pd.Timedelta(hours=1):
        minutes = int(step / pd.Timedelta(minutes=1))
        label = f"{minutes // 1440}d" if minutes % 1440 == 0 else f"{minutes // 60}h" if minutes % 60 == 0 \
            else f"{minutes}min"
        draft.entries["cadence"] = Entry(label, "high", f"the most common step between stamps is {step}")
    draft.questions = list(draft.clock.questions) + draft.questions
    if any(e.confidence == "low" for e in draft.units.values()):
        draft.questions.append("units marked low are guesses: the agency's documentation decides")
    return draft


# -- rendering -----------------------------------------------------------------------------------------------

def _flow(value) -> str:
    return yaml.safe_dump(value, default_flow_style=True, width=10_000, sort_keys=False).strip()


def _comment(text: str) -> str:
    """Delivered text (codes, column names, stamps) in a comment: one line, whatever the dump holds, so it
    can never add a key to the block."""
    return "# " + one_line(text, 400)


def _line(indent: int, key: str, value, entry: Entry | None = None) -> str:
    text = " " * indent + _flow({key: value})[1:-1]
    if entry is not None:
        text += "   " + _comment(entry.confidence + (f": {entry.why}" if entry.why else ""))
    return text


def render(draft: Draft) -> str:
    """The draft as a YAML data-config block; comments carry confidences, evidence and questions."""
    block = draft.block()
    out = [f"# Drafted from {len(draft.files)} file(s), {draft.rows_sampled} records sampled. Review every line:",
           "# high = read from the data, medium = likely, low = a guess. Then try it: shiftgrid new-city check FILE",
           "cities:", f"  {draft.city}:"]
    for key, entry in draft.entries.items():
        out.append(_line(4, key, entry.value, entry))
        if key in ("station_column", "station_columns"):
            codes = ", ".join(f"{code} ({n})" for code, n in draft.station_codes.items())
            out.append("    " + _comment(f"station codes (rows): {codes}; add station_map if the station table "
                                         f"uses other ids"))
    out.append(_line(4, "time", block["time"], Entry(None, draft.clock.confidence)))
    out += ["    " + _comment(f"  {line}") for line in draft.clock.evidence]
    if block["layout"] != "station_columns_csv":
        out.append(f"    {'variables' if block['layout'] == 'long_csv' else 'columns'}:")
        out += [_line(6, raw, entry.value, entry) for raw, entry in draft.mapping.items()]
        out += ["      " + _comment(f"not mapped: {raw} ({why})") for raw, why in draft.unmapped.items()]
    if draft.units:
        out.append("    units:")
        out += [_line(6, variable, entry.value, entry) for variable, entry in draft.units.items()]
    out += ["# Questions:"] + ["#   - " + _comment(q)[2:] for q in draft.questions]
    return "\n".join(out) + "\n"
