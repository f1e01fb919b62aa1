"""Statistics from per-origin forecast errors: Diebold-Mariano against the ERM twin, block-bootstrap intervals.

Pure pandas/numpy functions on each run's predictions artifact (predictions/target_predictions.parquet:
one row per target test window and selection rule with y_hXX / p_hXX and the station's MASE scale),
handed over by pipeline.aggregate; nothing is read or written here. Config keys obeyed (passed in):
report.bootstrap_samples; horizon and stride in hours, from the run's `forecast.horizon_hours` and
`forecast.stride_hours` params (the artifact's columns count steps of the cadence).

Which loss a test uses follows the grid metric: squared error for mse and rmse, absolute error scaled by
the station's MASE scale for mase, absolute error for every other metric (mae and the exceedance scores,
which have no per-window loss of their own). The loss is named in every result (`dm_loss`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline import resampling, stats
from pipeline.errors import InputError

LOSSES = ("absolute", "squared", "scaled_absolute")
INTERVAL_METRICS = ("mae", "mse", "rmse", "mase")  # metrics that are sums over windows, hence resamplable


def loss_for(metric_base: str) -> str:
    if metric_base in ("mse", "rmse"):
        return "squared"
    return "scaled_absolute" if metric_base == "mase" else "absolute"


def horizon_of(predictions: pd.DataFrame) -> int:
    """Forecast horizon in steps of the study's cadence: the number of y_hXX columns (one per step ahead)."""
    return sum(col.startswith("y_h") for col in predictions.columns)


def window_errors(predictions: pd.DataFrame, rule: str) -> pd.DataFrame:
    """Per target test window of one rule: sums of |error| and error^2 over the horizon, the number of
    finite pairs and the station's MASE scale; indexed by (station_id, origin) in UTC.

    A window whose pairs are all NaN has nothing to score and is left out.
    """
    chosen = predictions[predictions["selection"] == rule]
    y_cols = sorted(col for col in chosen.columns if col.startswith("y_h"))
    errors = chosen[y_cols].to_numpy(np.float64) - chosen[[f"p{c[1:]}" for c in y_cols]].to_numpy(np.float64)
    finite = np.isfinite(errors)
    scale = (chosen["naive_scale"].to_numpy(np.float64) if "naive_scale" in chosen.columns
             else np.full(len(chosen), np.nan))  # artifacts written before per-station scales: no MASE tests
    frame = pd.DataFrame({"abs_sum": np.where(finite, np.abs(errors), 0.0).sum(axis=1),
                          "sq_sum": np.where(finite, errors ** 2, 0.0).sum(axis=1),
                          "count": finite.sum(axis=1).astype(np.float64), "naive_scale": scale},
                         index=pd.MultiIndex.from_arrays(
                             [chosen["station_id"].astype(str).to_numpy(),
                              pd.DatetimeIndex(pd.to_datetime(chosen["origin"], utc=True))],
                             names=["station_id", "origin"]))
    return frame[frame["count"] > 0]


def window_loss(errors: pd.DataFrame, loss: str) -> pd.Series:
    """Mean loss over the horizon of each window: |e|, e^2, or |e| / station scale."""
    if loss == "squared":
        return errors["sq_sum"] / errors["count"]
    mean_abs = errors["abs_sum"] / errors["count"]
    if loss == "scaled_absolute":
        scale = errors["naive_scale"].where(errors["naive_scale"] > 0)
        return (mean_abs / scale).dropna()
    return mean_abs


def stride_hours(origins: pd.DatetimeIndex, stride_param=None) -> int:
    """The stride between forecast origins: the run's `forecast.stride_hours` param when logged, otherwise
    the greatest common divisor of the gaps between origins (hours)."""
    if stride_param is not None and np.isfinite(float(stride_param)):
        return int(float(stride_param))
    hours = np.unique(((origins - origins.min()) // pd.Timedelta(hours=1)).to_numpy(np.int64))
    gaps = np.diff(hours)
    return int(np.gcd.reduce(gaps)) if gaps.size else 1


def positions_on_grid(origins: pd.DatetimeIndex, stride: int, start: pd.Timestamp | None = None) -> np.ndarray:
    """Each origin's index on the stride grid that starts at `start` (default: the first origin)."""
    start = origins.min() if start is None else start
    offset = np.asarray((origins - start) // pd.Timedelta(hours=1), dtype=np.int64)
    if np.any(offset % stride):
        raise InputError(f"forecast origins are not on a {stride}-hour grid", field="forecast.stride_hours")
    return offset // stride


def _seed_mean(series: list[pd.Series]) -> pd.Series:
    """Average per-window losses over seeds, window by window (windows every seed has)."""
    return pd.concat(series, axis=1, join="inner").mean(axis=1)


def paired_dm(penalised: list[pd.DataFrame], erm: list[pd.DataFrame], loss: str, horizon: int,
              stride: int) -> dict:
    """Diebold-Mariano + HLN of a penalty's per-window losses against its ERM twin's.

    Windows are paired by (station_id, origin) after averaging over seeds; the differences are then
    averaged over stations at each origin, giving one series at the forecast stride. Lags follow the
    overlap of the windows (stats.dm_lag_order: ceil(H / s) - 1, capped at T - 2); origins with no pair
    keep their place on the stride grid (stats.hac_variance). d = loss(penalty) - loss(ERM): a negative
    statistic and mean difference mean the penalty has the smaller error.
    """
    lags = stats.dm_lag_order(horizon, stride)
    empty = {"dm_loss": loss, "dm_stat": np.nan, "dm_hln": np.nan, "dm_p": np.nan, "dm_n": 0,
             "dm_lags": lags, "dm_mean_diff": np.nan}
    if not penalised or not erm:
        return empty
    pairs = pd.concat([_seed_mean([window_loss(e, loss) for e in penalised]),
                       _seed_mean([window_loss(e, loss) for e in erm])], axis=1, join="inner").dropna()
    diff = (pairs.iloc[:, 0] - pairs.iloc[:, 1]).groupby(level="origin").mean().sort_index()
    size = len(diff)
    if size < 3:
        return {**empty, "dm_n": size}
    lags = min(lags, size - 2)
    positions = positions_on_grid(pd.DatetimeIndex(diff.index), stride)
    result = stats.diebold_mariano(diff.to_numpy(), lags, positions=positions)
    return {"dm_loss": loss, "dm_stat": result.statistic, "dm_hln": result.hln_statistic, "dm_p": result.p_value,
            "dm_n": size, "dm_lags": result.lags, "dm_mean_diff": float(diff.mean())}


def _metric_from_sums(metric: str, sums: np.ndarray, scales: np.ndarray) -> np.ndarray:
    """Metric per resample from summed errors (r, seeds, stations, 3: abs, sq, count), mean over seeds.

    mae / mse / rmse pool a seed's pairs over stations (as pipeline.metrics does); mase averages the
    stations' own MAE / scale (pipeline.metrics.mase_over_stations). A resample that drew no pair of a
    seed gives NaN for that replicate (dropped by the percentile interval).
    """
    abs_sum, sq_sum, count = sums[..., 0], sums[..., 1], sums[..., 2]
    with np.errstate(divide="ignore", invalid="ignore"):
        if metric == "mase":
            per_station = abs_sum / count / np.where(scales > 0, scales, np.nan)
            usable = np.isfinite(per_station)
            per_seed = np.where(usable, per_station, 0.0).sum(axis=-1) / usable.sum(axis=-1)
        else:
            pooled = (sq_sum if metric in ("mse", "rmse") else abs_sum).sum(axis=-1) / count.sum(axis=-1)
            per_seed = np.sqrt(pooled) if metric == "rmse" else pooled
    return per_seed.mean(axis=-1)


def cell_intervals(seed_errors: list[pd.DataFrame], horizon: int, stride: int, n_boot: int,
                   seed: int = 0) -> dict[str, dict]:
    """95 % moving-block bootstrap interval over test origins of one cell, for every metric in
    INTERVAL_METRICS (each the mean over seeds); {metric: {ci_low, ci_high, ci_block, ci_origins, point}}.

    Every seed's windows are laid on the stride grid of the cell's origins (a missing origin is a row of
    zeros: it adds neither error nor pairs), and blocks of `resampling.block_length` consecutive grid
    origins are resampled for all seeds and stations at once, so the dependence between overlapping
    windows, between stations on the same hours and between seeds on the same test data stays inside a
    block. All metrics are read off the same resamples (one pass). `point` is the statistic on the
    original sample: it equals the cell mean of the logged metric (checked in tests/test_window_stats.py).
    """
    empty = {"ci_low": np.nan, "ci_high": np.nan, "ci_block": np.nan, "ci_origins": 0, "point": np.nan}
    frames = [e for e in seed_errors if len(e)]
    if not frames or len(frames) != len(seed_errors):
        return {metric: dict(empty) for metric in INTERVAL_METRICS}
    stations = np.unique(np.concatenate([e.index.get_level_values("station_id").to_numpy(str) for e in frames]))
    origins = pd.DatetimeIndex(np.unique(np.concatenate(
        [e.index.get_level_values("origin").to_numpy("datetime64[ns]") for e in frames]))).tz_localize("UTC")
    n = int(positions_on_grid(origins, stride).max()) + 1
    values = np.zeros((n, len(frames), len(stations), 3))
    scales = np.full((len(frames), len(stations)), np.nan)
    for k, errors in enumerate(frames):
        rows = positions_on_grid(pd.DatetimeIndex(errors.index.get_level_values("origin")), stride, origins.min())
        cols = np.searchsorted(stations, errors.index.get_level_values("station_id").to_numpy(str))
        np.add.at(values, (rows, k, cols), errors[["abs_sum", "sq_sum", "count"]].to_numpy(np.float64))
        scales[k] = errors.groupby(level="station_id")["naive_scale"].first().reindex(stations).to_numpy()
    block = resampling.block_length(horizon, stride, n)
    flat = values.reshape(n, -1)

    def statistic(sums: np.ndarray) -> np.ndarray:  # (r, metrics)
        shaped = sums.reshape(len(sums), len(frames), len(stations), 3)
        return np.stack([_metric_from_sums(metric, shaped, scales) for metric in INTERVAL_METRICS], axis=1)

    points = statistic(flat.sum(axis=0, keepdims=True))[0]
    if n < 2:
        return {metric: {**empty, "ci_origins": n, "point": float(point)}
                for metric, point in zip(INTERVAL_METRICS, points)}
    replicates = resampling.moving_block_replicates(flat, statistic, block, n_boot, seed)
    results = {}
    for j, metric in enumerate(INTERVAL_METRICS):
        low, high = resampling.percentile_interval(replicates[:, j])
        results[metric] = {"ci_low": low, "ci_high": high, "ci_block": block, "ci_origins": n,
                           "point": float(points[j])}
    return results


def holm_by_family(dm: pd.DataFrame) -> pd.Series:
    """Holm-adjusted DM p-values; one family = every penalised-vs-ERM-twin comparison of the grid under one
    selection rule and one loss (every split, model and penalty together)."""
    adjusted = pd.Series(np.nan, index=dm.index, dtype=np.float64)
    for _, family in dm.groupby(["selection_rule", "dm_loss"], sort=False):
        adjusted.loc[family.index] = stats.holm(family["dm_p"].to_numpy())
    return adjusted

