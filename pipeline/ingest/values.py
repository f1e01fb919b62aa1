"""Delivered value text -> canonical numbers and QC flags.

Reads and writes nothing. Obeys the format keys `decimal`, `missing_values`, `sentinels`, and the
delivered units (per variable, or per row in long layouts). Order of checks, first match wins:
missing (empty cell or a missing-value word, any letter case) -> unparseable (text that is not a number) ->
sentinel (a delivered no-data code, compared before unit conversion, as delivered) ->
out of range (outside the canonical variable's [low, high] after conversion).
A value with any flag other than ok becomes NaN; the flag keeps the reason.

Most cells are plain numbers or missing-value words as delivered, so pyarrow's cast reads those (its
results are bit for bit what pandas' to_numeric gives for such text); the few other cells (stray words,
padded text, other letter cases, nan / inf spellings) take the per-cell rules above through pandas.
"""

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from pipeline.units import Conversion
from pipeline.variables import (BY_NAME, QC_MISSING, QC_OK, QC_OUT_OF_RANGE, QC_SENTINEL,
                                QC_UNPARSEABLE)


# Text both parsers read the same way: optional sign, digits with one decimal point, optional exponent.
_PLAIN_NUMBER = r"^[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?$"


def parse_numbers(text: pd.Series, spec: dict) -> tuple[np.ndarray, np.ndarray]:
    """Text -> (float64 values as delivered, int8 flags); flagged values are NaN."""
    return parse_number_columns({"": text}, spec)[""]


def parse_number_columns(columns: dict, spec: dict) -> dict:
    """parse_numbers for several text columns at once ({name: text} -> {name: (numbers, flags)}): their few
    irregular cells go through the per-cell rules together, in one pass instead of one per column."""
    parsed, irregular = {}, {}
    for name, text in columns.items():
        numbers, flags, other = _parse_plain(text, spec)
        parsed[name] = numbers, flags
        if other.any():
            irregular[name] = other
    if irregular:
        numbers, flags = _parse_cells(pd.concat([columns[name][other] for name, other in irregular.items()],
                                                ignore_index=True), spec)
        start = 0
        for name, other in irregular.items():
            end = start + int(other.sum())
            parsed[name][0][other], parsed[name][1][other] = numbers[start:end], flags[start:end]
            start = end
    for numbers, flags in parsed.values():
        numbers[flags != QC_OK] = np.nan
    return parsed


def _parse_plain(text: pd.Series, spec: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(numbers, flags, mask of the cells left to the per-cell rules): plain numbers and missing-value words
    as delivered are read here, through Arrow."""
    words = spec["missing_values"]
    arrow_text = isinstance(text.dtype, pd.StringDtype) and text.dtype.storage == "pyarrow"
    if not arrow_text or text.hasnans or any(word != word.strip() for word in words):
        return np.full(len(text), np.nan), np.full(len(text), QC_OK, dtype="int8"), np.ones(len(text), dtype=bool)
    cells = text.array.__arrow_array__()  # the column's Arrow chunks, no copy
    is_missing = pc.is_in(cells, value_set=pa.array(words, cells.type))
    missing = is_missing.to_numpy(zero_copy_only=False)
    dotted = cells if spec["decimal"] == "." else pc.replace_substring(cells, spec["decimal"], ".")
    readable = pc.if_else(is_missing, pa.scalar(None, cells.type), dotted) if missing.any() else dotted
    try:
        numbers = pc.cast(readable, pa.float64()).to_numpy(zero_copy_only=False)
        plain = ~missing
    except pa.ArrowInvalid:  # some cell is not a number: read only the plain ones here
        plain = pc.match_substring_regex(readable, _PLAIN_NUMBER).fill_null(False).to_numpy(zero_copy_only=False)
        numbers = pc.cast(pc.if_else(plain, readable, pa.scalar(None, cells.type)),
                          pa.float64()).to_numpy(zero_copy_only=False)
    numbers = np.array(numbers, dtype="float64")  # writable; nulls are NaN
    plain &= np.isfinite(numbers)
    flags = np.full(len(text), QC_OK, dtype="int8")
    flags[missing] = QC_MISSING
    flags[plain & np.isin(numbers, np.asarray(spec["sentinels"], dtype="float64"))] = QC_SENTINEL
    return numbers, flags, ~missing & ~plain


def _parse_cells(text: pd.Series, spec: dict) -> tuple[np.ndarray, np.ndarray]:
    """The per-cell rules of the module docstring, for any text."""
    stripped = text.astype(str).str.strip()
    missing = stripped.isin(spec["missing_values"]).to_numpy(copy=True)
    if spec["decimal"] != ".":
        stripped = stripped.str.replace(spec["decimal"], ".", regex=False)
    numbers = pd.to_numeric(stripped.where(~missing), errors="coerce").to_numpy(dtype="float64", copy=True)
    # Missing-value words match in any letter case (NaN, nan, NAN, n/a); only the few texts that are not
    # numbers are lower-cased, so the common path stays vectorised.
    words = {word.lower() for word in spec["missing_values"]}
    other = ~missing & np.isnan(numbers)
    missing[other] = stripped[other].str.lower().isin(words).to_numpy()
    unparseable = ~missing & np.isnan(numbers)
    sentinel = ~missing & np.isin(numbers, np.asarray(spec["sentinels"], dtype="float64"))
    flags = np.full(len(text), QC_OK, dtype="int8")
    flags[missing] = QC_MISSING
    flags[unparseable] = QC_UNPARSEABLE
    flags[sentinel] = QC_SENTINEL
    numbers[flags != QC_OK] = np.nan
    return numbers, flags


def to_canonical(numbers: np.ndarray, flags: np.ndarray, variable: str,
                 conversion: Conversion) -> tuple[np.ndarray, np.ndarray]:
    """Convert into canonical units and flag physically impossible values."""
    values = conversion.apply(numbers)
    limits = BY_NAME[variable]
    with np.errstate(invalid="ignore"):
        impossible = (flags == QC_OK) & ((values < limits.low) | (values > limits.high))
    flags = flags.copy()
    flags[impossible] = QC_OUT_OF_RANGE
    values = np.where(flags == QC_OK, values, np.nan)
    return values, flags
