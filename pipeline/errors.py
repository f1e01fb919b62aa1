"""One error type for bad input, so every caller can turn it into a one-line message.

Messages follow `FILE:ROW: FIELD: what is wrong` (row and field when known). The CLI and the rule
scripts print `error: <message>` and exit with status 2 instead of a traceback.

Messages quote delivered text (station codes, units, file names), which may hold newlines, terminal
escape sequences or megabytes of garbage: `one_line` escapes every non-printable character and bounds
the length, so a message is always exactly one harmless line.
"""

from dataclasses import fields

MAX_MESSAGE_CHARS = 1000


def one_line(text: str, limit: int = MAX_MESSAGE_CHARS) -> str:
    """`text` with control and separator characters escaped (\\n, \\x1b, ...), cut to `limit` characters."""
    text = str(text)
    if not text.isprintable():
        text = "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in text)
    return text if len(text) <= limit else text[:limit - 3] + "..."


class InputError(Exception):
    """Bad user input: a file, a row, a field or a configuration value that cannot be used."""

    def __init__(self, message: str, *, file: str | None = None, row: int | None = None,
                 field: str | None = None):
        parts = []
        if file is not None:
            parts.append(f"{file}:{row}" if row is not None else str(file))
        if field is not None:
            parts.append(str(field))
        parts.append(str(message))
        super().__init__(one_line(": ".join(parts)))
        self.file, self.row, self.field = file, row, field


def check_keys(values, known, field: str, *, required=(), what: str = "key", file: str | None = None) -> None:
    """One-line InputError naming `FIELD.KEY` for the first key of `values` that is not in `known`, or the
    first `required` key that is missing. The one check of a mapping's keys (config groups, dataclass
    schemas, model parameters), so every such error reads the same."""
    listed = ", ".join(sorted(known)) or "none"
    for key in values:
        if key not in known:
            raise InputError(f"unknown {what} (known: {listed})", file=file, field=f"{field}.{key}")
    for key in required:
        if key not in values:
            raise InputError(f"missing {what} (required: {', '.join(required)})", file=file, field=f"{field}.{key}")


def from_mapping(schema, values, field: str, *, file: str | None = None):
    """`schema(**values)` for a dataclass `schema`, after check_keys against its fields (None: the defaults)."""
    values = dict(values or {})
    check_keys(values, {f.name for f in fields(schema)}, field, file=file)
    return schema(**values)
