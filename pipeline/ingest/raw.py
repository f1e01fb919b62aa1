"""What every layout reader returns, and the CSV reading shared by the CSV layouts.

Reads raw dump files as text (nothing is parsed as a number here, so that a stray word in a value column
is flagged later instead of failing the whole file); writes nothing. Obeys the format keys
`separator`, `header_line`, `encoding`.

Two readers give the same table. pyarrow's CSV reader (multi-threaded C++, columns kept as Arrow strings)
reads the plain files most deliveries are: UTF-8, no quotes, no blank lines, every record one line with the
header's field count, so a record's line number is its position. Anything else (or a record pyarrow
refuses) goes through the careful readers below, which count blank lines and set malformed records aside.

Line numbers are as an editor shows them: the first line of the file is line 1.
A record whose number of fields differs from the header's (a truncated last line, a line written with
another delimiter, a stray quote) is not fatal: it is counted as `unparseable_record` and its first
line numbers are listed in the QC report, like a broken line of a JSON-lines dump.
"""

import codecs
import csv
import hashlib
import io
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv

from pipeline.errors import InputError
from pipeline.textfile import decode_text, read_text

# Columns of RawTable.frame besides the value columns.
KEY_COLUMNS = ("file", "line", "station_raw", "time_raw")
MAX_LISTED_LINES = 20  # malformed line numbers listed per file in the QC report


@dataclass
class RawTable:
    """Text of the delivered records, one row per record of the dump.

    Wide layouts: one text column per canonical variable. Long layouts: `variable_raw`,
    `value_raw`, `unit_raw`. `pre_dropped` counts records already unusable while reading
    (reason -> count); they belong to the rows read.
    """
    frame: pd.DataFrame
    long: bool
    files: list[dict] = field(default_factory=list)
    pre_dropped: dict[str, int] = field(default_factory=dict)


@dataclass
class CsvText:
    """One delimited file as text: the table (with its `line` column) and what reading it skipped."""
    table: pd.DataFrame
    blank_lines: int
    malformed_records: int  # physical lines of records with the wrong number of fields
    malformed_lines: list[int]  # first line of each (up to MAX_LISTED_LINES)

    def file_entry(self, path, digest: str) -> dict:
        return {"path": str(path), "rows": len(self.table) + self.malformed_records,
                "blank_lines": self.blank_lines, "malformed_records": self.malformed_records,
                "malformed_lines": self.malformed_lines, "sha256": digest}


def _header(lines: list[str], path: Path, spec: dict) -> list[str]:
    header_line = spec["header_line"]
    if not any(line.strip() for line in lines):
        raise InputError("the file is empty (no header line)", file=str(path), row=1, field="header")
    if header_line > len(lines) or not lines[header_line - 1].strip():
        raise InputError("no header on this line (see the format's header_line)", file=str(path),
                         row=header_line, field="header_line")
    names = next(csv.reader([lines[header_line - 1].rstrip("\r")], delimiter=spec["separator"]))
    names = [name.strip() or f"Unnamed: {i}" for i, name in enumerate(names)]
    seen = set()
    for name in names:
        if name in seen:
            raise InputError("column name appears twice in the header", file=str(path), row=header_line,
                             field=name)
        seen.add(name)
    return names


def _fast_table(text: str, names: list[str], spec: dict, path: Path) -> pd.DataFrame:
    """pandas' C reader: every line is one record, so data row k sits on line header_line + 1 + k."""
    header_line = spec["header_line"]
    try:
        table = pd.read_csv(io.StringIO(text), sep=spec["separator"], dtype=str, keep_default_na=False,
                            skip_blank_lines=False, skiprows=header_line - 1, header=0)
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as error:
        raise InputError(f"not a readable table ({str(error).strip().splitlines()[0]})",
                         file=str(path)) from None
    table.columns = names
    table.insert(0, "line", range(header_line + 1, header_line + 1 + len(table)))
    return table


def _careful_table(text: str, names: list[str], spec: dict, path: Path) -> CsvText:
    """Python's csv reader, record by record: quoted fields may hold separators and line ends, and records
    with the wrong number of fields are set aside and counted (by physical lines)."""
    buffer = io.StringIO(text, newline="")
    for _ in range(spec["header_line"]):  # preamble and header
        buffer.readline()
    reader = csv.reader(buffer, delimiter=spec["separator"], strict=False)
    rows, lines, bad_lines = [], [], []
    blank = malformed = previous = 0
    while True:
        first = spec["header_line"] + previous + 1
        try:
            record = next(reader)
        except StopIteration:
            break
        except csv.Error as error:
            raise InputError(f"not a readable CSV record ({error})", file=str(path), row=first,
                             field="separator") from None
        span, previous = reader.line_num - previous, reader.line_num
        if not any(value.strip() for value in record):
            blank += span
        elif len(record) == len(names):
            rows.append(record)
            lines.append(first)
        else:
            malformed += span
            if len(bad_lines) < MAX_LISTED_LINES:
                bad_lines.append(first)
    table = pd.DataFrame(rows, columns=names, dtype=str) if rows else pd.DataFrame(columns=names, dtype=str)
    table.insert(0, "line", lines)
    return CsvText(table, blank, malformed, bad_lines)


_UTF8_BOM = b"\xef\xbb\xbf"


def _blank_line(separator: str) -> re.Pattern:
    """A line that holds nothing but ASCII whitespace and separators (blank to the careful reader)."""
    return re.compile(rb"\n[ \t\r\f\v\x1c-\x1f" + re.escape(separator.encode()) + rb"]*(?:\n|$)")


def _plain_table(data: bytes, text: str, spec: dict, path: Path) -> tuple[pa.Table, str] | None:
    """The table through pyarrow when the file is plain (see the module docstring); None otherwise.

    `data` is the file's bytes, `text` the same decoded. Returns (Arrow table of strings, digest); data row k
    is on line header_line + 1 + k.
    """
    if codecs.lookup(spec["encoding"]).name != "utf-8":
        return None
    body = data[len(_UTF8_BOM):] if data.startswith(_UTF8_BOM) else data
    if b'"' in body or b"\x00" in body or not (body.isascii() or _utf8_plain(body)):
        return None
    header_line, separator = spec["header_line"], spec["separator"]
    start = -1
    for _ in range(header_line):  # the body starts after the header line's line end
        start = body.find(b"\n", start + 1)
        if start < 0:
            return None
    rest = body[start:]  # keeps the header's line end: every data line follows a \n
    rest = rest[:-2] if rest.endswith(b"\r\n") else rest.removesuffix(b"\n")
    if len(rest) < 2 or rest.count(b"\r") != rest.count(b"\r\n") or _blank_line(separator).search(rest):
        return None
    names = _header(text.split("\n", header_line), path, spec)
    try:
        arrow = pacsv.read_csv(io.BytesIO(rest[1:]),
                               read_options=pacsv.ReadOptions(column_names=names),
                               parse_options=pacsv.ParseOptions(delimiter=separator, quote_char=False),
                               convert_options=pacsv.ConvertOptions(
                                   column_types={name: pa.large_string() for name in names},
                                   strings_can_be_null=False))
    except pa.ArrowInvalid:  # a record with the wrong number of fields: the careful reader counts it
        return None
    if arrow.num_rows != rest.count(b"\n"):
        return None
    return arrow, hashlib.sha256(data).hexdigest()


def _joined(plain: list[tuple[Path, pa.Table]], spec: dict) -> tuple[pd.Categorical, pd.DataFrame]:
    """Consecutive plain files with one header as one table (one conversion to pandas, one frame for the
    layout to build): (the file of each row, the table with its `line` column)."""
    table = pa.concat_tables([arrow for _, arrow in plain]).to_pandas()  # large_string: no conversion copy
    rows = [arrow.num_rows for _, arrow in plain]
    first = spec["header_line"] + 1
    table.insert(0, "line", np.concatenate([np.arange(first, first + count) for count in rows]))
    files = pd.Categorical.from_codes(np.repeat(np.arange(len(plain)), rows),
                                      categories=[str(path) for path, _ in plain])
    return files, table


def _utf8_plain(body: bytes) -> bool:
    """Non-ASCII text is read by pyarrow only without Unicode whitespace or control characters, whose
    stripping rules the careful reader owns (they decide which lines count as blank)."""
    return re.search(rb"\xc2[\x80-\xa0]|\xe1\x9a\x80|\xe2\x80[\x80-\x8a\xa8\xa9\xaf]|\xe2\x81\x9f"
                     rb"|\xe3\x80\x80", body) is None


def read_csv_text(path: Path, spec: dict) -> CsvText:
    """Read a delimited file as strings; blank lines skipped and counted, malformed records counted."""
    text = read_text(path, spec["encoding"])
    return _careful_text(text, path, spec)


def _careful_text(text: str, path: Path, spec: dict) -> CsvText:
    lines = text.split("\n")
    names = _header(lines, path, spec)
    # The C reader is ~3x faster; it is used when every record is one line with the header's field count.
    body = pd.Series(lines[spec["header_line"]:], dtype="str")
    counts = body.str.count(re.escape(spec["separator"]))[body.str.strip() != ""]
    plain = '"' not in text and bool((counts == len(names) - 1).all())
    if not plain:
        return _careful_table(text, names, spec, path)
    table = _fast_table(text, names, spec, path)
    values = table.drop(columns="line")
    blank = values.apply(lambda column: column.str.strip() == "").all(axis=1)
    return CsvText(table[~blank].reset_index(drop=True), int(blank.sum()), 0, [])


def require_columns(names, columns, path: Path, header_line: int):
    for column in columns:
        if column not in names:
            raise InputError("column named in the format is not in the header", file=str(path),
                             row=header_line, field=column)


def time_text(table: pd.DataFrame, time_spec: dict) -> pd.Series:
    """The timestamp as one string per row, joining year/month/day/hour(/minute) parts if configured."""
    if "column" in time_spec:
        return table[time_spec["column"]].str.strip()
    parts = time_spec["parts"]
    text = (table[parts["year"]].str.strip() + "-" + table[parts["month"]].str.strip() + "-"
            + table[parts["day"]].str.strip() + " " + table[parts["hour"]].str.strip())
    if "minute" in parts:
        text = text + ":" + table[parts["minute"]].str.strip()
    return text


def time_columns(time_spec: dict) -> list[str]:
    return [time_spec["column"]] if "column" in time_spec else list(time_spec["parts"].values())


def read_csv_files(paths: list, spec: dict, needed: list[str], frames_of, long: bool,
                   records_per_line: int = 1) -> RawTable:
    """Every file of a CSV layout: its columns checked, its table turned into raw frames by
    `frames_of(files, table)` (`files`: the file of each row), its lines accounted for (a malformed line
    loses `records_per_line` records)."""
    tables, plain_run, files, malformed = [], [], [], 0

    def end_plain_run():
        if plain_run:
            tables.append(_joined(plain_run, spec))
            plain_run.clear()

    for path in paths:
        data = Path(path).read_bytes()  # read once: decoded, parsed and digested from these bytes
        decoded = decode_text(data, path, spec["encoding"])  # one-line error naming an undecodable byte's line
        plain = _plain_table(data, decoded, spec, path)
        if plain is None:
            text, digest = _careful_text(decoded, path, spec), hashlib.sha256(data).hexdigest()
            require_columns(text.table.columns, needed, path, spec["header_line"])
            end_plain_run()
            tables.append((file_column(path, len(text.table)), text.table))
        else:
            arrow, digest = plain
            text = CsvText(arrow, 0, 0, [])
            require_columns(arrow.column_names, needed, path, spec["header_line"])
            # A layout with several records per line lays its rows out file by file: joining files would
            # change the delivery order of its rows.
            if plain_run and (plain_run[-1][1].schema != arrow.schema or records_per_line != 1):
                end_plain_run()
            plain_run.append((path, arrow))
        files.append(text.file_entry(path, digest))
        malformed += text.malformed_records * records_per_line
    end_plain_run()
    frames = [frame for rows_file, table in tables for frame in frames_of(rows_file, table)]
    return RawTable(pd.concat(frames, ignore_index=True), long=long, files=files,
                    pre_dropped={"unparseable_record": malformed})


def file_column(path: Path, rows: int) -> pd.Categorical:
    """The path on every row as a category: one byte per row, not one copy of the text per row."""
    return pd.Categorical.from_codes(np.zeros(rows, dtype="int8"), categories=[str(path)])


def located(files: pd.Categorical, table: pd.DataFrame, spec: dict) -> dict:
    """The columns every raw frame starts with: where each record came from, its station and its stamp."""
    return {"file": files, "line": table["line"],
            "station_raw": table[spec["station_column"]].str.strip(),
            "time_raw": time_text(table, spec["time"])}
