"""Layout `jsonl`: one JSON object per line (one station and hour), values possibly nested.

Reads the files matched by the format key `files`; writes nothing. Obeys `station_column` and
`time.column` (field names), `columns` ({dotted field path: canonical variable}, e.g. "obs.pm25"),
`encoding` (a UTF-8 BOM is skipped). A line that is not a JSON object is counted as dropped
(`unparseable_record`, its line listed in the QC report), not fatal: real deliveries end with a truncated
line now and then. An empty file, or bytes that do not decode, end in a one-line error naming the line.
"""

import json

import pandas as pd

from pipeline.errors import InputError
from pipeline.ingest.raw import MAX_LISTED_LINES, RawTable
from pipeline.provenance import file_digest
from pipeline.textfile import read_text


def _lookup(record: dict, dotted: str):
    value = record
    for part in dotted.split("."):
        if not isinstance(value, dict) or part not in value:
            return None
        value = value[part]
    return value


def _text(value) -> str:
    return "" if value is None else str(value).strip()


def read(paths: list, spec: dict) -> RawTable:
    if "parts" in spec["time"]:
        raise InputError("jsonl needs time.column, not parts", field="time.parts")
    fields = {"station_raw": spec["station_column"], "time_raw": spec["time"]["column"],
              **{canonical: path for path, canonical in spec["columns"].items()}}
    rows, files, unparseable = [], [], 0
    for path in paths:
        seen = dict.fromkeys(fields, False)
        count = blank = malformed = 0
        bad_lines = []
        text = read_text(path, spec["encoding"])
        if not text.strip():
            raise InputError("the file is empty (no record)", file=str(path), row=1, field="records")
        lines = text.split("\n")
        for line_number, line in enumerate(lines[:-1] if not lines[-1] else lines, start=1):
            if not line.strip():
                blank += 1
                continue
            count += 1
            try:
                record = json.loads(line)
            except (json.JSONDecodeError, RecursionError):  # RecursionError: absurdly deep nesting
                record = None
            if not isinstance(record, dict):
                malformed += 1
                if len(bad_lines) < MAX_LISTED_LINES:
                    bad_lines.append(line_number)
                continue
            row = {"file": str(path), "line": line_number}
            for name, dotted in fields.items():
                value = _lookup(record, dotted)
                seen[name] = seen[name] or value is not None
                row[name] = _text(value)
            rows.append(row)
        parsed = count - malformed
        if parsed and not any(seen.values()):
            raise InputError("no record has any of the fields named in the format", file=str(path),
                             field=spec["station_column"])
        for name, present in seen.items():
            if parsed and not present and name in ("station_raw", "time_raw"):
                raise InputError("field named in the format is in no record", file=str(path),
                                 field=fields[name])
        files.append({"path": str(path), "rows": count, "blank_lines": blank,
                      "malformed_records": malformed,
                      "malformed_lines": bad_lines, "sha256": file_digest(path)})
        unparseable += malformed
    columns = ["file", "line", *fields]
    frame = pd.DataFrame(rows, columns=columns).astype({c: "str" for c in columns if c != "line"})
    return RawTable(frame, long=False, files=files, pre_dropped={"unparseable_record": unparseable})
