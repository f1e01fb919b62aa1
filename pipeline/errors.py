"""One error type for bad input, so every caller can turn it into a one-line message.

Messages follow `FILE:ROW: FIELD: what is wrong` (row and field when known). The CLI and the rule
scripts print `error: <message>` and exit with status 2 instead of a traceback.
"""


class InputError(Exception):
    """Bad user input: a file, a row, a field or a configuration value that cannot be used."""

    def __init__(self, message: str, *, file: str | None = None, row: int | None = None,
                 field: str | None = None):
        parts = []
        if file is not None:
            parts.append(f"{file}:{row}" if row is not None else str(file))
        if field is not None:
            parts.append(str(field))
        parts.append(message)
        super().__init__(": ".join(parts))
        self.file, self.row, self.field = file, row, field
