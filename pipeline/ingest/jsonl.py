"""Layout `jsonl`: one JSON object per line (one station and hour), values possibly nested.

Reads the files matched by the format key `files`; writes nothing. Obeys `station_column` and
`time.column` (field names), `columns` ({dotted field path: canonical variable}, e.g. "obs.pm25"),
`encoding`. A line that is not a JSON object is counted as dropped (`unparseable_record`), not fatal:
real deliveries end with a truncated line now and then.
"""

import json

import pandas as pd

from pipeline.errors import InputError
from pipeline.ingest.raw import RawTable
from pipeline.provenance import file_digest


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
        count = blank = 0
        with open(path, encoding=spec["encoding"]) as handle:
            for line_number, line in enumerate(handle, start=1):
                if not line.strip():
                    blank += 1
                    continue
                count += 1
                try:
                    record = json.loads(line)
                except json.JSONDecodeError:
                    record = None
                if not isinstance(record, dict):
                    unparseable += 1
                    continue
                row = {"file": str(path), "line": line_number}
                for name, dotted in fields.items():
                    value = _lookup(record, dotted)
                    seen[name] = seen[name] or value is not None
                    row[name] = _text(value)
                rows.append(row)
        if count and not any(seen.values()):
            raise InputError("no record has any of the fields named in the format", file=str(path),
                             field=spec["station_column"])
        for name, present in seen.items():
            if count and not present and name in ("station_raw", "time_raw"):
                raise InputError("field named in the format is in no record", file=str(path),
                                 field=fields[name])
        files.append({"path": str(path), "rows": count, "blank_lines": blank,
                      "sha256": file_digest(path)})
    columns = ["file", "line", *fields]
    frame = pd.DataFrame(rows, columns=columns).astype({c: "str" for c in columns if c != "line"})
    return RawTable(frame, long=False, files=files, pre_dropped={"unparseable_record": unparseable})
