"""Layout `wide_csv`: one row per station and hour, one column per variable.

Reads the files matched by the format key `files`; writes nothing. Obeys `station_column`, `time`,
`columns`, `separator`, `decimal` (applied later, when values are parsed), `header_line`, `encoding`.
A semicolon-separated file with decimal commas is this layout with separator ";" and decimal ",".
"""

import pandas as pd

from pipeline.ingest.raw import RawTable, located, read_csv_files, time_columns


def read(paths: list, spec: dict) -> RawTable:
    needed = [spec["station_column"], *time_columns(spec["time"]), *spec["columns"]]

    def frames_of(files, table):
        # .array keeps the Arrow strings as they are (no copy into Python objects)
        return [pd.DataFrame({**located(files, table, spec),
                              **{canonical: table[raw_name].array for raw_name, canonical in spec["columns"].items()}})]

    return read_csv_files(paths, spec, needed, frames_of, long=False)
