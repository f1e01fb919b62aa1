"""Layout `station_columns_csv`: one row per time step, one column per station, one variable.

A common agency export (a year of daily means, a column per monitoring site). Reads the files matched
by the format key `files`; writes nothing. Obeys `station_columns` (the columns holding stations; the
column name is the station code, mapped by `station_map`), `variable` (the canonical variable every
cell holds), `time`, `separator`, `decimal`, `header_line`, `encoding`. Each cell is one delivered
record: rows read = data lines x station columns.
"""

import pandas as pd

from pipeline.ingest.raw import RawTable, read_csv_files, time_columns, time_text


def read(paths: list, spec: dict) -> RawTable:
    variable = spec["variable"]

    def frames_of(files, table):
        times = time_text(table, spec["time"])
        return [pd.DataFrame({"file": files, "line": table["line"], "station_raw": column, "time_raw": times,
                              variable: table[column].array}) for column in spec["station_columns"]]

    return read_csv_files(paths, spec, [*time_columns(spec["time"]), *spec["station_columns"]], frames_of,
                          long=False, records_per_line=len(spec["station_columns"]))
