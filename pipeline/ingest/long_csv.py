"""Layout `long_csv`: one row per station, hour and variable, with the unit on every row.

Reads the files matched by the format key `files`; writes nothing. Obeys `station_column`, `time`,
`variable_column`, `value_column`, `unit_column` (when absent, `units` gives one unit per variable),
`variables` (codes in the dump -> canonical names), `separator`, `header_line`, `encoding`.
"""

import pandas as pd

from pipeline.ingest.raw import RawTable, located, read_csv_files, time_columns


def read(paths: list, spec: dict) -> RawTable:
    needed = [spec["station_column"], *time_columns(spec["time"]), spec["variable_column"],
              spec["value_column"]] + ([spec["unit_column"]] if "unit_column" in spec else [])

    def frames_of(files, table):
        return [pd.DataFrame({**located(files, table, spec),
                              "variable_raw": table[spec["variable_column"]].str.strip(),
                              "value_raw": table[spec["value_column"]],
                              "unit_raw": (table[spec["unit_column"]].str.strip()
                                           if "unit_column" in spec else "")})]

    return read_csv_files(paths, spec, needed, frames_of, long=True)
