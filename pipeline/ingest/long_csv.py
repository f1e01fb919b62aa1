"""Layout `long_csv`: one row per station, hour and variable, with the unit on every row.

Reads the files matched by the format key `files`; writes nothing. Obeys `station_column`, `time`,
`variable_column`, `value_column`, `unit_column` (when absent, `units` gives one unit per variable),
`variables` (codes in the dump -> canonical names), `separator`, `header_line`, `encoding`.
"""

import pandas as pd

from pipeline.ingest.raw import RawTable, read_csv_text, require_columns, time_columns, time_text
from pipeline.provenance import file_digest


def read(paths: list, spec: dict) -> RawTable:
    frames, files, malformed = [], [], 0
    needed = [spec["station_column"], *time_columns(spec["time"]), spec["variable_column"],
              spec["value_column"]] + ([spec["unit_column"]] if "unit_column" in spec else [])
    for path in paths:
        text = read_csv_text(path, spec)
        table = text.table
        require_columns(table, needed, path, spec["header_line"])
        frame = pd.DataFrame({"file": str(path), "line": table["line"],
                              "station_raw": table[spec["station_column"]].str.strip(),
                              "time_raw": time_text(table, spec["time"]),
                              "variable_raw": table[spec["variable_column"]].str.strip(),
                              "value_raw": table[spec["value_column"]],
                              "unit_raw": (table[spec["unit_column"]].str.strip()
                                           if "unit_column" in spec else "")})
        frames.append(frame)
        files.append(text.file_entry(path, file_digest(path)))
        malformed += text.malformed_records
    return RawTable(pd.concat(frames, ignore_index=True), long=True, files=files,
                    pre_dropped={"unparseable_record": malformed})
