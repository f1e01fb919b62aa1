"""What every layout reader returns, and the CSV reading shared by the CSV layouts.

Reads raw dump files as text (nothing is parsed as a number here, so that a stray word in a value column
is flagged later instead of failing the whole file); writes nothing. Obeys the format keys
`separator`, `header_line`, `encoding`.

Line numbers are as an editor shows them: the first line of the file is line 1.
"""

from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from pipeline.errors import InputError

# Columns of RawTable.frame besides the value columns.
KEY_COLUMNS = ("file", "line", "station_raw", "time_raw")


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


def read_csv_text(path: Path, spec: dict) -> tuple[pd.DataFrame, int]:
    """Read a delimited file as strings; return (table with a `line` column, blank lines skipped)."""
    header_line = spec["header_line"]
    try:
        table = pd.read_csv(path, sep=spec["separator"], dtype=str, keep_default_na=False,
                            skip_blank_lines=False, skiprows=header_line - 1, header=0,
                            encoding=spec["encoding"])
    except UnicodeDecodeError as error:
        raise InputError(f"not readable as {spec['encoding']} ({error.reason})", file=str(path)) from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as error:
        raise InputError(f"not a readable table ({str(error).strip().splitlines()[0]})",
                         file=str(path)) from None
    table.columns = [str(c).strip() for c in table.columns]
    # Data row k (0-based) sits on line header_line + 1 + k because blank lines are kept as rows.
    table.insert(0, "line", range(header_line + 1, header_line + 1 + len(table)))
    values = table.drop(columns="line")
    blank = (values.apply(lambda column: column.str.strip() == "")).all(axis=1)
    return table[~blank].reset_index(drop=True), int(blank.sum())


def require_columns(table: pd.DataFrame, columns, path: Path, header_line: int):
    for column in columns:
        if column not in table.columns:
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
