"""Statistics from per-origin forecast errors: Diebold-Mariano against the ERM twin, block-bootstrap intervals.

Pure numpy functions on each run's predictions artifact (predictions/target_predictions.parquet: one row
per target test window and selection rule with y_hXX / p_hXX and the station's MASE scale), handed over by
pipeline.aggregate as a pyarrow Table (or a pandas DataFrame) and kept per rule as `Windows` arrays; nothing
is read or written here. A grid runs thousands of tests and intervals, so each has a batch form
(`paired_dm_many`, `cell_intervals_many`) and the one-comparison functions are batches of one. Config keys obeyed (passed in):
report.bootstrap_samples; horizon and stride in hours, from the run's `forecast.horizon_hours` and
`forecast.stride_hours` params (the artifact's columns count steps of the cadence).

Which loss a test uses follows the grid metric: squared error for mse and rmse, absolute error scaled by
the station's MASE scale for mase, absolute error for every other metric (mae and the exceedance scores,
which have no per-window loss of their own). The loss is named in every result (`dm_loss`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow as pa

from pipeline import resampling, stats
from pipeline.errors import InputError

LOSSES = ("absolute", "squared", "scaled_absolute")
INTERVAL_METRICS = ("mae", "mse", "rmse", "mase")  # metrics that are sums over windows, hence resamplable
DM_COLUMNS = ("dm_loss", "dm_stat", "dm_hln", "dm_p", "dm_n", "dm_lags", "dm_mean_diff")  # a paired_dm row, in order
INTERVAL_COLUMNS = ("ci_low", "ci_high", "ci_block", "ci_origins", "point")  # a cell_intervals entry, in order
HOUR_NS = 3_600_000_000_000  # origins are kept as int64 nanoseconds since the epoch, UTC
PREDICTION_COLUMNS = ("station_id", "origin", "selection", "naive_scale")  # besides y_hXX / p_hXX


def loss_for(metric_base: str) -> str:
    if metric_base in ("mse", "rmse"):
        return "squared"
    return "scaled_absolute" if metric_base == "mase" else "absolute"


def horizon_of(predictions) -> int:
    """Forecast horizon in steps of the study's cadence: the number of y_hXX columns (one per step ahead)."""
    return sum(col.startswith("y_h") for col in _names(predictions))


def wanted(column: str) -> bool:
    """The artifact columns the statistics read (so a reader can leave the others on disk)."""
    return column in PREDICTION_COLUMNS or column.startswith(("y_h", "p_h"))


@dataclass(frozen=True)
class Windows:
    """One run's scored target test windows under one selection rule, one row per window, as arrays: the sums
    of |error| and error^2 over the horizon, the number of finite pairs and the station's MASE scale.
    Arrays rather than a DataFrame because the grid builds two per run and thousands of runs."""

    station: np.ndarray  # station ids, str
    origin: np.ndarray  # int64 nanoseconds since the epoch, UTC
    abs_sum: np.ndarray
    sq_sum: np.ndarray
    count: np.ndarray
    naive_scale: np.ndarray

    def __len__(self) -> int:
        return len(self.origin)

    def loss(self, loss: str) -> np.ndarray:
        """Mean loss over the horizon of each window: |e|, e^2, or |e| / station scale (NaN: no usable scale)."""
        if loss == "squared":
            return self.sq_sum / self.count
        mean_abs = self.abs_sum / self.count
        if loss == "scaled_absolute":
            return mean_abs / np.where(self.naive_scale > 0, self.naive_scale, np.nan)
        return mean_abs

    def frame(self) -> pd.DataFrame:
        """The same windows as a table indexed by (station_id, origin)."""
        return pd.DataFrame({"abs_sum": self.abs_sum, "sq_sum": self.sq_sum, "count": self.count,
                             "naive_scale": self.naive_scale},
                            index=pd.MultiIndex.from_arrays(
                                [self.station, pd.DatetimeIndex(self.origin.view("datetime64[ns]"), tz="UTC")],
                                names=["station_id", "origin"]))


def _names(predictions) -> list[str]:
    return list(predictions.column_names if isinstance(predictions, pa.Table) else predictions.columns)


def _column(predictions, name: str) -> np.ndarray:
    if isinstance(predictions, pa.Table):
        return predictions.column(name).to_numpy()
    return predictions[name].to_numpy()


def origins_of(predictions) -> np.ndarray:
    """The origin column as int64 UTC nanoseconds (a naive timestamp is read as UTC, as pandas' utc=True does)."""
    if isinstance(predictions, pa.Table) and pa.types.is_timestamp(predictions.schema.field("origin").type):
        return predictions.column("origin").to_numpy().astype("datetime64[ns]").view(np.int64)
    column = predictions.column("origin").to_pandas() if isinstance(predictions, pa.Table) else predictions["origin"]
    return pd.DatetimeIndex(pd.to_datetime(column, utc=True)).as_unit("ns").asi8


def _stations(predictions) -> np.ndarray:
    if isinstance(predictions, pa.Table):
        column = predictions.column("station_id")
        if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
            return column.to_numpy().astype(str)
        column = column.to_pandas()
    else:
        column = predictions["station_id"]
    return column.astype(str).to_numpy().astype(str)


def windows_by_rule(predictions, rules) -> dict[str, Windows]:
    """Per rule: the scored windows of one predictions artifact (a pandas DataFrame or a pyarrow Table).

    A window whose pairs are all NaN has nothing to score and is left out. Errors are y - p in float64.
    """
    names = _names(predictions)
    y_cols = sorted(col for col in names if col.startswith("y_h"))
    selection = _column(predictions, "selection")
    station, origin = _stations(predictions), origins_of(predictions)
    # (H, rows): the horizon is summed step by step, in the order the DataFrame version summed it
    errors = (np.stack([_column(predictions, col).astype(np.float64) for col in y_cols])
              - np.stack([_column(predictions, f"p{col[1:]}").astype(np.float64) for col in y_cols])
              ) if y_cols else np.zeros((0, len(selection)))
    finite = np.isfinite(errors)
    abs_sum = np.where(finite, np.abs(errors), 0.0).sum(axis=0)
    sq_sum = np.where(finite, errors ** 2, 0.0).sum(axis=0)
    count = finite.sum(axis=0).astype(np.float64)
    scale = (_column(predictions, "naive_scale").astype(np.float64) if "naive_scale" in names
             else np.full(len(selection), np.nan))  # artifacts written before per-station scales: no MASE tests
    by_rule = {}
    for rule in rules:
        keep = (selection == rule) & (count > 0)
        by_rule[rule] = Windows(station[keep], origin[keep], abs_sum[keep], sq_sum[keep], count[keep], scale[keep])
    return by_rule


def window_errors(predictions: pd.DataFrame, rule: str) -> pd.DataFrame:
    """Per target test window of one rule: sums of |error| and error^2 over the horizon, the number of
    finite pairs and the station's MASE scale; indexed by (station_id, origin) in UTC (`Windows.frame`)."""
    return windows_by_rule(predictions, [rule])[rule].frame()


def as_windows(errors) -> Windows:
    """A `Windows`, or the table `window_errors` gives turned back into one."""
    if isinstance(errors, Windows):
        return errors
    return Windows(errors.index.get_level_values("station_id").to_numpy().astype(str),
                   pd.DatetimeIndex(errors.index.get_level_values("origin")).as_unit("ns").asi8,
                   *(errors[column].to_numpy(np.float64) for column in ("abs_sum", "sq_sum", "count", "naive_scale")))


def window_loss(errors: pd.DataFrame, loss: str) -> pd.Series:
    """Mean loss over the horizon of each window of a `window_errors` table (windows without a usable MASE
    scale left out)."""
    values = pd.Series(as_windows(errors).loss(loss), index=errors.index)
    return values.dropna() if loss == "scaled_absolute" else values


def _as_ns(origins) -> np.ndarray:
    if isinstance(origins, pd.DatetimeIndex):
        return origins.as_unit("ns").asi8
    return np.asarray(origins, dtype=np.int64)


def stride_hours(origins, stride_param=None) -> int:
    """The stride between forecast origins: the run's `forecast.stride_hours` param when logged, otherwise
    the greatest common divisor of the gaps between origins (hours). Origins: a DatetimeIndex or int64 ns."""
    if stride_param is not None and np.isfinite(float(stride_param)):
        return int(float(stride_param))
    ns = _as_ns(origins)
    if not ns.size:
        return 1
    gaps = np.diff(np.unique((ns - ns.min()) // HOUR_NS))
    return int(np.gcd.reduce(gaps)) if gaps.size else 1


def positions_on_grid(origins, stride: int, start=None) -> np.ndarray:
    """Each origin's index on the stride grid that starts at `start` (default: the first origin).
    Origins and start: DatetimeIndex / Timestamp or int64 ns."""
    ns = _as_ns(origins)
    start = ns.min() if start is None else (start.value if isinstance(start, pd.Timestamp) else int(start))
    offset = (ns - start) // HOUR_NS
    if np.any(offset % stride):
        raise InputError(f"forecast origins are not on a {stride}-hour grid", field="forecast.stride_hours")
    return offset // stride


def _keys(runs: list[Windows]) -> tuple[list[np.ndarray], np.ndarray, int]:
    """Per run, each window's column in the union of the runs' (station, origin) pairs; the union's origin
    (ns) of each column and the number of columns. A pair twice in one run is an error: windows pair by it."""
    stations, station_of = np.unique(np.concatenate([w.station for w in runs]), return_inverse=True)
    origins, origin_of = np.unique(np.concatenate([w.origin for w in runs]), return_inverse=True)
    union, column = np.unique(station_of.astype(np.int64) * len(origins) + origin_of, return_inverse=True)
    bounds = np.cumsum([0] + [len(w) for w in runs])
    columns = [column[a:b] for a, b in zip(bounds[:-1], bounds[1:])]
    for found in columns:
        if np.unique(found).size != found.size:
            raise InputError("a predictions artifact holds a (station, origin) window twice under one rule",
                             field="predictions")
    return columns, origins[union % len(origins)], len(union)


def dm_differentials(penalised: list, erm: list, stride: int) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per loss: the loss differential penalty - ERM at each origin and the origin's place on the stride grid.

    Windows are paired by (station_id, origin) after averaging over seeds (a window counts when every seed
    of both sides has it), then averaged over the paired stations at each origin.
    """
    runs = [as_windows(e) for e in [*penalised, *erm]]
    columns, column_origin, width = _keys(runs)
    out = {}
    for loss in LOSSES:
        table = np.full((len(runs), width), np.nan)
        for row, (windows, found) in enumerate(zip(runs, columns)):
            table[row, found] = windows.loss(loss)
        # a NaN (missing window or unusable scale) in any seed leaves the window out, as an inner join would
        diff = table[:len(penalised)].mean(axis=0) - table[len(penalised):].mean(axis=0)
        paired = np.isfinite(diff)
        origins, origin_of = np.unique(column_origin[paired], return_inverse=True)
        per_origin = np.bincount(origin_of, diff[paired], len(origins)) / np.bincount(origin_of, None, len(origins))
        out[loss] = (per_origin, positions_on_grid(origins, stride) if origins.size else origins)
    return out


def paired_dm_many(comparisons: list[tuple[list, list, int, int]]) -> list[dict[str, dict]]:
    """Diebold-Mariano + HLN of each (penalised seeds, ERM seeds, horizon, stride) comparison, per loss of
    LOSSES ({loss: row}); every test of the list is computed together (stats.diebold_mariano_many).

    d = loss(penalty) - loss(ERM) per origin (`dm_differentials`): a negative statistic and mean difference
    mean the penalty has the smaller error. Lags follow the overlap of the windows (stats.dm_lag_order:
    ceil(H / s) - 1, capped at T - 2); origins with no pair keep their place on the stride grid
    (stats.hac_variance). Fewer than 3 paired origins: no test (NaN, with dm_n).
    """
    results, tests = [], []
    for index, (penalised, erm, horizon, stride) in enumerate(comparisons):
        lags = stats.dm_lag_order(horizon, stride)
        results.append({loss: dict(zip(DM_COLUMNS, (loss, np.nan, np.nan, np.nan, 0, lags, np.nan)))
                        for loss in LOSSES})
        if not penalised or not erm:
            continue
        for loss, (diff, positions) in dm_differentials(penalised, erm, stride).items():
            results[index][loss]["dm_n"] = diff.size
            if diff.size >= 3:
                tests.append((index, loss, diff, min(lags, diff.size - 2), positions))
    outcomes = stats.diebold_mariano_many([t[2] for t in tests], [t[3] for t in tests], [t[4] for t in tests])
    for (index, loss, diff, _, _), result in zip(tests, outcomes):
        results[index][loss].update({"dm_stat": result.statistic, "dm_hln": result.hln_statistic,
                                     "dm_p": result.p_value, "dm_lags": result.lags,
                                     "dm_mean_diff": float(diff.mean())})
    return results


def paired_dm(penalised: list, erm: list, loss: str, horizon: int, stride: int) -> dict:
    """Diebold-Mariano + HLN of a penalty's per-window losses against its ERM twin's, for one loss
    (`paired_dm_many` of one comparison)."""
    return paired_dm_many([(penalised, erm, horizon, stride)])[0][loss]


def _metric_from_sums(metric: str, sums: np.ndarray, scales: np.ndarray) -> np.ndarray:
    """Metric per resample from summed errors (3: abs, sq, count; seeds; stations; ...), mean over seeds.

    The trailing axes are the resamples (and cells); `scales` (seeds, stations, ...) broadcasts against
    them. Seeds and stations lead so each sum over them adds whole contiguous slabs (summed in the same
    order as over a trailing axis). mae / mse / rmse pool a seed's pairs over stations (as
    pipeline.metrics does); mase averages the stations' own MAE / scale
    (pipeline.metrics.mase_over_stations). A resample that drew no pair of a seed gives NaN for that
    replicate (dropped by the percentile interval).
    """
    abs_sum, sq_sum, count = sums[0], sums[1], sums[2]
    with np.errstate(divide="ignore", invalid="ignore"):
        if metric == "mase":
            per_station = abs_sum / count / np.where(scales > 0, scales, np.nan)
            usable = np.isfinite(per_station)
            per_seed = np.where(usable, per_station, 0.0).sum(axis=1) / usable.sum(axis=1)
        else:
            pooled = (sq_sum if metric in ("mse", "rmse") else abs_sum).sum(axis=1) / count.sum(axis=1)
            per_seed = np.sqrt(pooled) if metric == "rmse" else pooled
    return per_seed.mean(axis=0)


def _metrics(sums: np.ndarray, scales: np.ndarray) -> np.ndarray:
    """Every INTERVAL_METRICS value from summed errors (3, seeds, stations, ...): (metrics, ...)."""
    return np.stack([_metric_from_sums(metric, sums, scales) for metric in INTERVAL_METRICS])


@dataclass(frozen=True)
class _Cell:
    """A cell laid on its stride grid: summed errors (n grid origins; 3: abs, sq, count; seeds; stations)."""

    values: np.ndarray
    scales: np.ndarray  # (seeds, stations)
    block: int


def _lay_out(seed_errors: list, horizon: int, stride: int) -> _Cell:
    frames = [as_windows(e) for e in seed_errors]
    stations = np.unique(np.concatenate([w.station for w in frames]))
    start = min(int(w.origin.min()) for w in frames)
    rows_of = [positions_on_grid(w.origin, stride, start) for w in frames]
    n = int(max(rows.max() for rows in rows_of)) + 1
    values = np.zeros((n, 3, len(frames), len(stations)))
    scales = np.full((len(frames), len(stations)), np.nan)
    for k, (windows, rows) in enumerate(zip(frames, rows_of)):
        cols = np.searchsorted(stations, windows.station)
        for feature, summed in enumerate((windows.abs_sum, windows.sq_sum, windows.count)):
            np.add.at(values[:, feature, k], (rows, cols), summed)
        known = np.flatnonzero(~np.isnan(windows.naive_scale))  # each station's first scale, as groupby.first
        first_cols, first = np.unique(cols[known], return_index=True)
        scales[k, first_cols] = windows.naive_scale[known[first]]
    return _Cell(values, scales, resampling.block_length(horizon, stride, n))


def cell_intervals_many(cells: list[tuple[list, int, int]], n_boot: int, seed: int = 0,
                        chunk_values: int = 4_000_000) -> list[dict[str, dict]]:
    """`cell_intervals` of each (seed errors, horizon, stride) cell, computed together.

    Every cell draws its blocks with the same `seed`, so cells with the same number of grid origins and the
    same block length share one resample: its count matrix (resampling.resample_counts) turns every such
    cell's sums into one matrix product. Cells are batched so that a batch's resampled sums hold at most
    `chunk_values` numbers.
    """
    empty = dict(zip(INTERVAL_COLUMNS, (np.nan, np.nan, np.nan, 0, np.nan)))
    results: list = [None] * len(cells)
    batches: dict[tuple, list[tuple[int, _Cell]]] = {}
    for index, (seed_errors, horizon, stride) in enumerate(cells):
        if not seed_errors or any(len(e) == 0 for e in seed_errors):
            results[index] = {metric: dict(empty) for metric in INTERVAL_METRICS}
            continue
        cell = _lay_out(seed_errors, horizon, stride)
        n = cell.values.shape[0]
        points = _metrics(cell.values.sum(axis=0), cell.scales)  # origin by origin, in order
        results[index] = {metric: {**empty, "ci_origins": n, "point": float(point)}
                          for metric, point in zip(INTERVAL_METRICS, points)}
        if n >= 2:
            batches.setdefault((n, cell.block, *cell.values.shape[2:]), []).append((index, cell))
    for (n, block, n_seeds, n_stations), members in batches.items():
        counts_t = resampling.resample_counts(n, block, n_boot, seed).T.copy()  # (n, n_boot)
        step = max(1, chunk_values // (n_boot * 3 * n_seeds * n_stations))
        for first in range(0, len(members), step):
            batch = members[first:first + step]
            values = np.stack([cell.values for _, cell in batch], axis=-1)  # (n, 3, seeds, stations, cells)
            sums = (values.reshape(n, -1).T @ counts_t).reshape(3, n_seeds, n_stations, len(batch), n_boot)
            scales = np.stack([cell.scales for _, cell in batch], axis=2)[..., None]  # (seeds, stations, cells, 1)
            replicates = _metrics(sums, scales)  # (metrics, cells, n_boot)
            low, high = resampling.percentile_intervals(replicates.reshape(-1, n_boot))
            low, high = low.reshape(len(INTERVAL_METRICS), -1), high.reshape(len(INTERVAL_METRICS), -1)
            for j, (index, _) in enumerate(batch):
                for m, metric in enumerate(INTERVAL_METRICS):
                    results[index][metric].update({"ci_low": float(low[m, j]), "ci_high": float(high[m, j]),
                                                   "ci_block": block})
    return results


def cell_intervals(seed_errors: list, horizon: int, stride: int, n_boot: int, seed: int = 0) -> dict[str, dict]:
    """95 % moving-block bootstrap interval over test origins of one cell, for every metric in
    INTERVAL_METRICS (each the mean over seeds); {metric: {ci_low, ci_high, ci_block, ci_origins, point}}.

    Every seed's windows are laid on the stride grid of the cell's origins (a missing origin is a row of
    zeros: it adds neither error nor pairs), and blocks of `resampling.block_length` consecutive grid
    origins are resampled for all seeds and stations at once, so the dependence between overlapping
    windows, between stations on the same hours and between seeds on the same test data stays inside a
    block. All metrics are read off the same resamples (one pass). `point` is the statistic on the
    original sample: it equals the cell mean of the logged metric (checked in tests/test_window_stats.py).
    No interval without a window in every seed; a point only with fewer than 2 grid origins.
    """
    return cell_intervals_many([(seed_errors, horizon, stride)], n_boot, seed)[0]


def holm_by_family(dm: pd.DataFrame) -> pd.Series:
    """Holm-adjusted DM p-values; one family = every penalised-vs-ERM-twin comparison of the grid under one
    selection rule and one loss (every split, model and penalty together)."""
    adjusted = pd.Series(np.nan, index=dm.index, dtype=np.float64)
    for _, family in dm.groupby(["selection_rule", "dm_loss"], sort=False):
        adjusted.loc[family.index] = stats.holm(family["dm_p"].to_numpy())
    return adjusted

