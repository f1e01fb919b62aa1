"""Point-forecast and threshold-exceedance scores for the comparison grid.

Pure numpy functions: they read arrays handed over by the evaluation step and write nothing.
No config keys are read here; the caller passes the per-station MASE scales
(`Windows.target_naive_scales`) and the hourly exceedance threshold (`metrics.hourly_exceedance_threshold`)
explicitly.

Missing values: a (y, yhat) pair where either side is NaN/inf is left out of every score, the same
way in each function, so MSE, MAE and the exceedance table always describe the same set of pairs.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from pipeline.errors import InputError

EXCEEDANCE_SCORES = ("pod", "far", "csi", "ets", "bias")  # scores of the exceedance contingency table
EXCEEDANCE_KEYS = ("hits", "false_alarms", "misses", "correct_negatives", *EXCEEDANCE_SCORES)
HEADLINE_KEYS = ("mse", "rmse", "mae", "mase", *EXCEEDANCE_SCORES)  # forecast_scores' keys, in its order
SEASON_HOURS = 24  # seasonal period m of the MASE scale: the daily cycle of hourly series


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


def seasonal_naive_scale(series, m: int = SEASON_HOURS) -> float:
    """MASE scale of ONE station: mean |y_t - y_{t-m}| over its training series (Hyndman & Koehler 2006).

    `series` is the station's 1-D training series on a complete hourly grid, so a lag of m steps is m
    hours. A difference with a NaN on either side is skipped. NaN when no difference is available (a
    series shorter than m + 1, or too gappy). This is the only implementation of the scale in the
    package: pipeline.windows calls it once per target station.
    """
    if not isinstance(m, (int, np.integer)) or isinstance(m, bool) or m < 1:
        raise InputError(f"seasonal period must be a positive integer, got {m!r}", field="m")
    values = np.asarray(series, dtype=np.float64)
    if values.ndim != 1:
        raise InputError(f"one station's series must be 1-D, got shape {values.shape}", field="series")
    if values.size <= m:
        return float("nan")
    diffs = np.abs(values[m:] - values[:-m])
    diffs = diffs[np.isfinite(diffs)]
    return float(diffs.mean()) if diffs.size else float("nan")


def mase(y, yhat, scale: float) -> float:
    """Mean absolute scaled error of ONE station: MAE / scale (Hyndman & Koehler 2006).

    A zero or non-finite scale (a constant or empty training series) makes MASE undefined: NaN.
    A negative scale cannot come from `seasonal_naive_scale` and is rejected.
    """
    scale = float(scale)
    if scale < 0:
        raise InputError(f"MASE scale must be >= 0, got {scale}", field="scale")
    if scale == 0 or not np.isfinite(scale):
        return float("nan")
    return mae(y, yhat) / scale


def mase_over_stations(y, yhat, stations, scales: dict) -> float:
    """MASE of a set of stations: each station's MAE over its own scale, then the plain mean over stations.

    Hyndman & Koehler (2006) scale each series by its own in-sample naive error, so a station with large
    swings does not dominate; stations are then weighted equally (not by how many windows they have).
    y and yhat are (n, H) or (n,), `stations` (n,) names the station of each row, `scales` maps every
    station to its training-series scale. A station whose MASE is undefined (no finite pair, zero scale)
    is left out of the mean; NaN when none is left.
    """
    y_arr = np.asarray(y, dtype=np.float64)
    yhat_arr = np.asarray(yhat, dtype=np.float64)
    labels = np.asarray(stations, dtype=object)
    if labels.shape != y_arr.shape[:1]:
        raise InputError(f"{labels.size} station labels for {y_arr.shape[0]} rows", field="stations")
    missing = sorted(set(labels) - set(scales))
    if missing:
        raise InputError(f"no MASE scale for stations {missing}", field="scales")
    values = [mase(y_arr[labels == station], yhat_arr[labels == station], scales[station])
              for station in sorted(set(labels))]
    finite = [value for value in values if np.isfinite(value)]
    return float(np.mean(finite)) if finite else float("nan")


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
    practice), judged on each value as given: hourly values here, so a threshold borrowed from a
    24-h-mean standard is NOT applied to a 24-h mean (the setting is named for that:
    `metrics.hourly_exceedance_threshold`; a research scoring threshold, not an alert level). Counts: hits a (forecast and observed), false_alarms b (forecast only), misses c
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


def forecast_scores(y, yhat, stations, scales: dict, threshold: float) -> dict[str, float]:
    """Every headline score of one forecast set as a flat dict of floats (ready for a tracker).

    y and yhat are (n, H) arrays in canonical units (a 1-D array counts as H = 1), `stations` (n,) the
    station of each row and `scales` the MASE scale of each station (see `mase_over_stations`). The
    exceedance event is "an hourly value above `threshold`", judged on each forecast hour. Keys: mse,
    rmse, mae, mase, pod, far, csi, ets, bias, then mae_h01 .. mae_hHH (horizon step, two digits; a
    horizon above 99 gets three digits).
    """
    y_arr = np.asarray(y, dtype=np.float64)
    yhat_arr = np.asarray(yhat, dtype=np.float64)
    # A single-step forecast may arrive as a vector; treat it as one horizon column.
    y_arr = y_arr.reshape(-1, 1) if y_arr.ndim == 1 else y_arr
    yhat_arr = yhat_arr.reshape(-1, 1) if yhat_arr.ndim == 1 else yhat_arr
    scores = {"mse": mse(y_arr, yhat_arr), "rmse": rmse(y_arr, yhat_arr),
              "mae": mae(y_arr, yhat_arr), "mase": mase_over_stations(y_arr, yhat_arr, stations, scales)}
    table = exceedance(y_arr, yhat_arr, threshold)
    scores.update({key: float(table[key]) for key in EXCEEDANCE_SCORES})
    for step, value in enumerate(per_horizon(y_arr, yhat_arr, mae), start=1):
        scores[f"mae_h{step:02d}"] = float(value)
    return scores
