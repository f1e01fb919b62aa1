"""Layout `station_columns_csv`: one row per time step, one column per station, one variable.

A common agency export (a year of daily means, a column per monitoring site). Reads the files matched
by the format key `files`; writes nothing. Obeys `station_columns` (the columns holding stations; the
column name is the station code, mapped by `station_map`), `variable` (the canonical variable every
cell holds), `time`, `separator`, `decimal`, `header_line`, `encoding`. Each cell is one delivered
record: rows read = data lines x station columns.
"""

import pandas as pd

from pipeline.ingest.raw import RawTable, read_csv_text, require_columns, time_columns, time_text
from pipeline.provenance import file_digest


def read(paths: list, spec: dict) -> RawTable:
    frames, files, malformed = [], [], 0
    variable = spec["variable"]
    for path in paths:
        text = read_csv_text(path, spec)
        table = text.table
        require_columns(table, [*time_columns(spec["time"]), *spec["station_columns"]], path, spec["header_line"])
        times = time_text(table, spec["time"])
        for column in spec["station_columns"]:
            frames.append(pd.DataFrame({"file": str(path), "line": table["line"], "station_raw": column,
                                        "time_raw": times, variable: table[column].to_numpy()}))
        files.append(text.file_entry(path, file_digest(path)))
        malformed += text.malformed_records * len(spec["station_columns"])
    return RawTable(pd.concat(frames, ignore_index=True), long=False, files=files,
                    pre_dropped={"unparseable_record": malformed})
