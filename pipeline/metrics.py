"""Point-forecast and threshold-exceedance scores for the comparison grid.

Pure numpy functions: they read arrays handed over by the evaluation step and write nothing.
No config keys are read here; the caller passes the MASE scale (`Windows.target_naive_scale`) and
the exceedance threshold explicitly.

Missing values: a (y, yhat) pair where either side is NaN/inf is left out of every score, the same
way in each function, so MSE, MAE and the exceedance table always describe the same set of pairs.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from pipeline.errors import InputError

EXCEEDANCE_KEYS = ("hits", "false_alarms", "misses", "correct_negatives",
                   "pod", "far", "csi", "ets", "bias")
HEADLINE_KEYS = ("mse", "rmse", "mae", "mase", "pod", "far", "csi", "ets", "bias")


def _valid_pairs(y, yhat) -> tuple[np.ndarray, np.ndarray]:
    """Flatten y and yhat (same shape required) and keep the pairs where both are finite."""
    y_arr = np.asarray(y, dtype=np.float64)
    yhat_arr = np.asarray(yhat, dtype=np.float64)
    if y_arr.shape != yhat_arr.shape:
        raise InputError(f"y has shape {y_arr.shape} but yhat has shape {yhat_arr.shape}",
                         field="yhat")
    keep = np.isfinite(y_arr) & np.isfinite(yhat_arr)
    return y_arr[keep], yhat_arr[keep]


def mse(y, yhat) -> float:
    """Mean squared error over the finite pairs; NaN when no pair is finite."""
    y_ok, yhat_ok = _valid_pairs(y, yhat)
    if y_ok.size == 0:
        return float("nan")
    return float(np.mean((y_ok - yhat_ok) ** 2))


def rmse(y, yhat) -> float:
    """Root mean squared error over the finite pairs; NaN when no pair is finite."""
    return float(np.sqrt(mse(y, yhat)))


def mae(y, yhat) -> float:
    """Mean absolute error over the finite pairs; NaN when no pair is finite."""
    y_ok, yhat_ok = _valid_pairs(y, yhat)
    if y_ok.size == 0:
        return float("nan")
    return float(np.mean(np.abs(y_ok - yhat_ok)))


def seasonal_naive_scale(series_by_station: Sequence[np.ndarray] | np.ndarray,
                         m: int = 24) -> float:
    """MASE denominator: mean |y_t - y_{t-m}| over the training series (Hyndman & Koehler 2006).

    `series_by_station` is one 1-D series or a list of them (one per station, each on a complete
    hourly grid). Differences are taken inside each series only, so a lag never reaches into another
    station's data; a difference with a NaN on either side is skipped. All differences of all
    stations are pooled (a station with more data weighs more). Returns NaN when no difference is
    available.
    """
    if not isinstance(m, (int, np.integer)) or isinstance(m, bool) or m < 1:
        raise InputError(f"seasonal period must be a positive integer, got {m!r}", field="m")
    if isinstance(series_by_station, np.ndarray):
        if series_by_station.ndim != 1:
            raise InputError("a single series must be 1-D; pass a list for several stations",
                             field="series_by_station")
        series_list = [series_by_station]
    else:
        series_list = list(series_by_station)
    total, count = 0.0, 0
    for index, series in enumerate(series_list):
        values = np.asarray(series, dtype=np.float64)
        if values.ndim != 1:
            raise InputError(f"series {index} is not 1-D (shape {values.shape})",
                             field="series_by_station")
        if values.size <= m:
            continue
        diffs = np.abs(values[m:] - values[:-m])
        diffs = diffs[np.isfinite(diffs)]
        total += float(diffs.sum())
        count += diffs.size
    return total / count if count else float("nan")


def mase(y, yhat, scale: float) -> float:
    """Mean absolute scaled error: MAE / scale (Hyndman & Koehler 2006).

    A zero or non-finite scale (a constant or empty training series) makes MASE undefined: NaN.
    A negative scale cannot come from `seasonal_naive_scale` and is rejected.
    """
    scale = float(scale)
    if scale < 0:
        raise InputError(f"MASE scale must be >= 0, got {scale}", field="scale")
    if scale == 0 or not np.isfinite(scale):
        return float("nan")
    return mae(y, yhat) / scale


def per_horizon(y, yhat, fn: Callable[[np.ndarray, np.ndarray], float]) -> np.ndarray:
    """Apply `fn(y_col, yhat_col)` to each horizon column of (n, H) arrays; returns shape (H,)."""
    y_arr = np.asarray(y, dtype=np.float64)
    yhat_arr = np.asarray(yhat, dtype=np.float64)
    if y_arr.ndim != 2 or y_arr.shape != yhat_arr.shape:
        raise InputError(f"per-horizon scores need two (n, H) arrays of the same shape, got "
                         f"{y_arr.shape} and {yhat_arr.shape}", field="yhat")
    return np.array([fn(y_arr[:, step], yhat_arr[:, step]) for step in range(y_arr.shape[1])],
                    dtype=np.float64)


def _ratio(numerator: float, denominator: float) -> float:
    return float(numerator / denominator) if denominator != 0 else float("nan")


def exceedance(y, yhat, threshold: float) -> dict[str, float]:
    """2x2 table and scores for the event "value > threshold" (Jolliffe & Stephenson 2012, ch. 3).

    An event is a value strictly above the threshold (an exceedance of a limit value, common
    practice). Counts: hits a (forecast and observed), false_alarms b (forecast only), misses c
    (observed only), correct_negatives d. Scores: pod = a/(a+c), far = b/(a+b), csi = a/(a+b+c),
    ets = (a - ar)/(a+b+c - ar) with ar = (a+b)(a+c)/n, bias = (a+b)/(a+c).
    A score whose denominator is 0 (e.g. no observed event: pod and bias) is NaN, not 0 or 1, so a
    city without episodes cannot look perfect or useless.
    """
    threshold = float(threshold)
    if not np.isfinite(threshold):
        raise InputError(f"exceedance threshold must be a finite number, got {threshold}",
                         field="threshold")
    y_ok, yhat_ok = _valid_pairs(y, yhat)
    observed = y_ok > threshold
    forecast = yhat_ok > threshold
    a = int(np.sum(observed & forecast))
    b = int(np.sum(~observed & forecast))
    c = int(np.sum(observed & ~forecast))
    d = int(np.sum(~observed & ~forecast))
    n = a + b + c + d
    random_hits = (a + b) * (a + c) / n if n else float("nan")
    return {
        "hits": a, "false_alarms": b, "misses": c, "correct_negatives": d,
        "pod": _ratio(a, a + c),
        "far": _ratio(b, a + b),
        "csi": _ratio(a, a + b + c),
        "ets": _ratio(a - random_hits, a + b + c - random_hits) if n else float("nan"),
        "bias": _ratio(a + b, a + c),
    }


def forecast_scores(y, yhat, scale: float, threshold: float) -> dict[str, float]:
    """Every headline score of one forecast set as a flat dict of floats (ready for a tracker).

    y and yhat are (n, H) arrays in canonical units (a 1-D array counts as H = 1). Keys: mse, rmse,
    mae, mase, pod, far, csi, ets, bias, then mae_h01 .. mae_hHH (horizon step, two digits; a
    horizon above 99 gets three digits).
    """
    y_arr = np.asarray(y, dtype=np.float64)
    yhat_arr = np.asarray(yhat, dtype=np.float64)
    # A single-step forecast may arrive as a vector; treat it as one horizon column.
    y_arr = y_arr.reshape(-1, 1) if y_arr.ndim == 1 else y_arr
    yhat_arr = yhat_arr.reshape(-1, 1) if yhat_arr.ndim == 1 else yhat_arr
    scores = {"mse": mse(y_arr, yhat_arr), "rmse": rmse(y_arr, yhat_arr),
              "mae": mae(y_arr, yhat_arr), "mase": mase(y_arr, yhat_arr, scale)}
    table = exceedance(y_arr, yhat_arr, threshold)
    scores.update({key: float(table[key]) for key in ("pod", "far", "csi", "ets", "bias")})
    for step, value in enumerate(per_horizon(y_arr, yhat_arr, mae), start=1):
        scores[f"mae_h{step:02d}"] = float(value)
    return scores
