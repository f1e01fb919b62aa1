"""Intervals of a grid cell: a moving-block bootstrap over forecast origins, and the spread over seeds.

Pure numpy/scipy functions; they read arrays handed over by pipeline.window_stats and write nothing.
No config keys are read here (the caller passes report.bootstrap_samples, the horizon and the stride).

Why blocks: forecast windows whose origins are less than a horizon apart share target hours, so their
errors are correlated; resampling single origins would treat them as independent draws and give
intervals that are too narrow. Blocks of at least ceil(H / s) consecutive origins keep that dependence
inside a block (Kunsch 1989; Lahiri 2003, ch. 2).
"""

from __future__ import annotations

import math
from typing import Callable

import numpy as np

from pipeline.errors import InputError

SEED_RANGE = "seed range"  # label of min-max over fewer than 3 seeds: never called a confidence interval
SEED_CI = "95% CI over seeds (t)"
MIN_SEEDS_FOR_CI = 3


def block_length(horizon_hours: int, stride_hours: int, n_positions: int) -> int:
    """Block length in origins: at least ceil(H / s), so no two overlapping windows are cut apart, and at
    least ceil(n^(1/3)), the order that Hall, Horowitz & Jing (1995) give for bootstrap variance
    estimation; never longer than the series."""
    overlap = math.ceil(horizon_hours / stride_hours)
    return int(max(1, min(n_positions, max(overlap, math.ceil(n_positions ** (1.0 / 3.0))))))


def moving_block_starts(n: int, block: int, n_boot: int, seed: int) -> np.ndarray:
    """Start positions (n_boot, ceil(n / block)) of a moving-block bootstrap, uniform on [0, n - block].

    Draws from numpy's Generator in the same order as arch.bootstrap.MovingBlockBootstrap, so with the
    same seed both pick the same blocks (tests/test_resampling.py checks it).
    """
    if not (isinstance(n, (int, np.integer)) and isinstance(block, (int, np.integer)) and 1 <= block <= n):
        raise InputError(f"block length must be an integer in [1, n = {n}], got {block!r}", field="block")
    if not isinstance(n_boot, (int, np.integer)) or n_boot < 1:
        raise InputError(f"must be a positive integer, got {n_boot!r}", field="report.bootstrap_samples")
    rng = np.random.default_rng(seed)
    return rng.integers(n - block + 1, size=(n_boot, math.ceil(n / block)), dtype=np.int64)


def block_counts(n: int, starts: np.ndarray, block: int) -> np.ndarray:
    """How often each of the n rows is picked by each moving-block resample: (n_boot, n).

    Each resample concatenates blocks of `block` consecutive rows from `starts` and truncates to n rows
    (the last block is cut short). A resample's column sums are then counts @ values: one matrix product
    serves every column (and every grid cell that shares the draws)."""
    lengths = np.full(starts.shape[1], block, dtype=np.int64)
    lengths[-1] = n - block * (starts.shape[1] - 1)
    offsets = np.arange(block)
    rows = starts[:, :, None] + offsets  # (n_boot, blocks, block)
    used = np.broadcast_to(offsets < lengths[:, None], rows.shape)
    flat = (np.arange(starts.shape[0])[:, None, None] * n + rows)[used]
    return np.bincount(flat, minlength=starts.shape[0] * n).reshape(starts.shape[0], n).astype(np.float64)


def resample_counts(n: int, block: int, n_boot: int, seed: int) -> np.ndarray:
    """`block_counts` of the draws `moving_block_starts(n, block, n_boot, seed)` makes."""
    return block_counts(n, moving_block_starts(n, block, n_boot, seed), block)


def resampled_sums(values: np.ndarray, starts: np.ndarray, block: int) -> np.ndarray:
    """Column sums of the rows a moving-block resample picks: (n_boot, features), for `values` (n, features)."""
    return block_counts(values.shape[0], starts, block) @ values


def moving_block_replicates(values: np.ndarray, statistic: Callable[[np.ndarray], np.ndarray], block: int,
                            n_boot: int, seed: int = 0, chunk: int = 500) -> np.ndarray:
    """`statistic` of each moving-block resample of the rows of `values` (n, features).

    `statistic` maps resampled column sums (r, features) to r values (or to (r, m) for m statistics read
    off the same resamples); using sums keeps ratio statistics
    (an MAE is a sum of errors over a count of pairs) exact for rows of unequal weight and for origins
    missing from the grid (a row of zeros). Chunks bound memory; the draws are those of
    `moving_block_starts` whatever the chunk size.
    """
    values = np.asarray(values, dtype=np.float64)
    if values.ndim != 2 or not np.isfinite(values).all():
        raise InputError(f"values must be a finite (n, features) array, got shape {values.shape}",
                         field="values")
    counts = resample_counts(values.shape[0], block, n_boot, seed)
    return np.concatenate([statistic(counts[i:i + chunk] @ values) for i in range(0, n_boot, chunk)])


def percentile_interval(replicates, level: float = 0.95) -> tuple[float, float]:
    """Percentile interval of bootstrap replicates (NaN replicates, e.g. empty resamples, left out)."""
    low, high = percentile_intervals(np.asarray(replicates, dtype=np.float64).reshape(1, -1), level)
    return float(low[0]), float(high[0])


def percentile_intervals(replicates: np.ndarray, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """`percentile_interval` of each row of (statistics, n_boot) replicates: (lows, highs). Rows without a
    NaN are done in one np.quantile call (the same quantiles row by row); the others one by one, without
    their NaN."""
    if not 0.0 < level < 1.0:
        raise InputError(f"level must lie in (0, 1), got {level}", field="level")
    tail = (1.0 - level) / 2.0
    bounds = np.full((2, replicates.shape[0]), np.nan)
    finite = np.isfinite(replicates)
    whole = finite.all(axis=1)
    if whole.any():
        bounds[:, whole] = np.quantile(replicates[whole], [tail, 1.0 - tail], axis=1)
    for row in np.flatnonzero(~whole & finite.any(axis=1)):
        bounds[:, row] = np.quantile(replicates[row, finite[row]], [tail, 1.0 - tail])
    return bounds[0], bounds[1]


def seed_interval(values) -> tuple[float, float, str]:
    """Spread of a cell over its seeds: (low, high, label).

    Fewer than 3 seeds: the seed range (min, max), labelled SEED_RANGE, because two or one values
    support no confidence statement. From 3 seeds: the Student t interval of the mean over seeds
    (mean +- t_{1-a/2, n-1} s / sqrt(n)), labelled SEED_CI. No finite value: NaN bounds.
    """
    arr = np.asarray(values, dtype=np.float64)
    arr = arr[np.isfinite(arr)]
    if arr.size == 0:
        return float("nan"), float("nan"), SEED_RANGE
    if arr.size < MIN_SEEDS_FOR_CI:
        return float(arr.min()), float(arr.max()), SEED_RANGE
    from scipy import stats as sps  # only here: importing scipy.stats takes ~1 s, and 1-2 seeds need none
    half = sps.t.ppf(0.975, arr.size - 1) * arr.std(ddof=1) / np.sqrt(arr.size)
    return float(arr.mean() - half), float(arr.mean() + half), SEED_CI
