"""Layout `wide_csv`: one row per station and hour, one column per variable.

Reads the files matched by the format key `files`; writes nothing. Obeys `station_column`, `time`,
`columns`, `separator`, `decimal` (applied later, when values are parsed), `header_line`, `encoding`.
A semicolon-separated file with decimal commas is this layout with separator ";" and decimal ",".
"""

import pandas as pd

from pipeline.ingest.raw import RawTable, read_csv_text, require_columns, time_columns, time_text
from pipeline.provenance import file_digest


def read(paths: list, spec: dict) -> RawTable:
    frames, files, malformed = [], [], 0
    needed = [spec["station_column"], *time_columns(spec["time"]), *spec["columns"]]
    for path in paths:
        text = read_csv_text(path, spec)
        table = text.table
        require_columns(table, needed, path, spec["header_line"])
        frame = pd.DataFrame({"file": str(path), "line": table["line"],
                              "station_raw": table[spec["station_column"]].str.strip(),
                              "time_raw": time_text(table, spec["time"])})
        for raw_name, canonical in spec["columns"].items():
            frame[canonical] = table[raw_name].to_numpy()
        frames.append(frame)
        files.append(text.file_entry(path, file_digest(path)))
        malformed += text.malformed_records
    return RawTable(pd.concat(frames, ignore_index=True), long=False, files=files,
                    pre_dropped={"unparseable_record": malformed})
