"""Names that become parts of file paths, Snakemake wildcards, MLflow tags and the report.

Reads and writes nothing. Station ids and city names (station table), model and penalty names (config
`sweep.models`, `sweep.penalties`: Hydra would accept `../model/x` as a group choice) are checked here, at
the boundary, so nothing further down has to escape them for a shell, a path or a glob. Text that is only
shown (codes in a dump, titles) is escaped where it is shown instead: pipeline.errors.one_line for the
terminal, html.escape in the report.
"""

import re

from pipeline.errors import InputError

SAFE_NAME = re.compile(r"^[a-z][a-z0-9_]*$")  # station ids, model and penalty names
CITY_NAME = re.compile(r"^[a-z][a-z0-9]*$")  # no "_": split ids join city names with "+" and "-"

# Penalty labels that are not penalties a user configures. Every penalised run is compared with the ERM
# run of the same split, model and sampling (its twin, pipeline.twins). Families that are not
# gradient-trained take no penalty: their runs are labelled NOT_APPLICABLE in tags, file names and tables,
# and shown as "n/a" on the command line and in the report (a "/" cannot be part of a file name).
ERM = "erm"
NOT_APPLICABLE = "na"
NOT_APPLICABLE_SHOWN = "n/a"


def penalty_shown(penalty: str) -> str:
    """How a penalty label is written for people (tables, figures, the command line)."""
    return NOT_APPLICABLE_SHOWN if penalty == NOT_APPLICABLE else penalty


def penalty_label(text: str) -> str:
    """The stored label of a penalty written as people write it (`--penalty n/a`); the inverse of penalty_shown."""
    return NOT_APPLICABLE if text == NOT_APPLICABLE_SHOWN else text


def check_name(value, pattern: re.Pattern = SAFE_NAME, *, file: str | None = None, row: int | None = None,
               field: str | None = None) -> str:
    """`value` as text when it matches `pattern`; an InputError naming where it came from otherwise."""
    text = str(value).strip()
    if not pattern.match(text):
        raise InputError(f"{text!r} must match {pattern.pattern} (it becomes part of file names, wildcards "
                         f"and tags)", file=file, row=row, field=field)
    return text
