"""Cadence: the time step of a study's clean tables, and aligning a delivery to it.

Reads and writes nothing. Obeys the format keys `cadence` (default 1h; e.g. 10min, 15min, 1h, 1d: a
duration of at least one minute that divides a day, so every step starts on the UTC day's grid) and
`completeness` (default 0.75).

The delivered step is read from the data: the most common difference between consecutive stamps of a
series. A delivery is aligned to the study's cadence:
- same step: kept as delivered;
- finer delivery (10-min readings, hourly study): each study step is the mean of its valid finer values
  when at least `completeness` of the finer steps it spans hold a valid value, else it is flagged
  `incomplete` (QC_INCOMPLETE) and left empty. The default 75 % is common practice in air-quality
  reporting: EU Directive 2008/50/EC, Annex XI, asks for 75 % of the values for an hourly value
  (45 minutes) and for a daily value (18 of 24 hourly values) [from memory];
- coarser delivery than the study's cadence: refused, because no rule makes data finer.
Daily steps are UTC days.
"""

import re

import numpy as np
import pandas as pd

from pipeline.errors import InputError
from pipeline.variables import QC_INCOMPLETE, QC_MISSING, QC_OK, qc_column

DEFAULT_CADENCE = "1h"
DEFAULT_COMPLETENESS = 0.75
DAY = pd.Timedelta(days=1)


def parse_cadence(text, config_file=None, field: str = "cadence") -> pd.Timedelta:
    """A cadence text (10min, 15min, 1h, 1d, ...) as a Timedelta; InputError naming the field otherwise."""
    try:
        step = pd.Timedelta(re.sub(r"(?<=\d)\s*d$", "D", str(text).strip()))  # pandas spells days "D"
    except (ValueError, TypeError):
        step = None
    if step is None or pd.isna(step) or step < pd.Timedelta(minutes=1) or step > DAY or DAY % step:
        raise InputError(f"{text!r} is not a cadence (a duration of at least 1min that divides a day, "
                         f"e.g. 10min, 15min, 1h, 1d)", file=config_file or "data config", field=field)
    return step


def cadence_label(step: pd.Timedelta) -> str:
    """The shortest spelling of a step: 10min, 1h, 1d."""
    if step % DAY == pd.Timedelta(0):
        return f"{step // DAY}d"
    if step % pd.Timedelta(hours=1) == pd.Timedelta(0):
        return f"{step // pd.Timedelta(hours=1)}h"
    return f"{step // pd.Timedelta(minutes=1)}min"


def delivered_step(times: pd.Series, series: pd.DataFrame) -> pd.Timedelta | None:
    """The most common positive difference between consecutive stamps of one series (None: no pair);
    the shortest of equally common ones."""
    valid = times.notna().to_numpy()
    nanos = times.to_numpy("datetime64[ns]", na_value=np.datetime64("NaT")).view("int64")[valid]
    series_of = series.groupby(list(series.columns), sort=False, dropna=False).ngroup().to_numpy()[valid]
    order = np.lexsort((nanos, series_of))
    nanos, series_of = nanos[order], series_of[order]
    steps = np.diff(nanos)[series_of[1:] == series_of[:-1]]
    steps = steps[steps > 0]  # repeated stamps are no step
    if not len(steps):
        return None
    lengths, counts = np.unique(steps, return_counts=True)
    return pd.Timedelta(int(lengths[np.argmax(counts)]), unit="ns")


def aggregate(clean: pd.DataFrame, variables: list[str], step: pd.Timedelta, cadence: pd.Timedelta,
              completeness: float) -> tuple[pd.DataFrame, dict]:
    """Means over each `cadence` step of a clean table on the finer `step` grid; (table, QC entry)."""
    per_value = int(cadence / step)
    needed = int(np.ceil(completeness * per_value - 1e-9))
    bins = clean["time"].dt.floor(cadence)
    keys = [clean["station_id"], bins]
    out = {}
    counts = {}
    for variable in variables:
        valid = clean[qc_column(variable)] == QC_OK
        grouped = clean[variable].where(valid).groupby(keys, sort=True)
        n_valid = grouped.count()
        complete = n_valid >= needed
        out[variable] = grouped.mean().where(complete)
        out[qc_column(variable)] = np.where(complete, QC_OK, np.where(n_valid > 0, QC_INCOMPLETE, QC_MISSING))
        counts[variable] = {"steps_complete": int(complete.sum()),
                            "steps_incomplete": int(((n_valid > 0) & ~complete).sum())}
    index = out[variables[0]].index
    table = pd.DataFrame({"station_id": index.get_level_values(0).astype("string"),
                          "time": index.get_level_values(1)})
    for variable in variables:
        table[variable] = out[variable].to_numpy()
        table[qc_column(variable)] = out[qc_column(variable)].astype("int8")
    rule = (f"a {cadence_label(cadence)} value is the mean of the valid {cadence_label(step)} values in it "
            f"when at least {needed} of {per_value} ({completeness:.0%}) are valid, else flagged incomplete")
    return table, {"rule": rule, "values_per_step": per_value, "valid_values_needed": needed,
                   "by_variable": counts}
