"""Block bootstrap over forecast origins and seed intervals, against arch and scipy."""

import math

import numpy as np
import pytest
from arch.bootstrap import MovingBlockBootstrap
from scipy import stats as sps

from pipeline.errors import InputError
from pipeline.resampling import (SEED_CI, SEED_RANGE, block_length, moving_block_replicates, moving_block_starts,
                                 percentile_interval, resampled_sums, seed_interval)


def ar1(n: int, phi: float, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = np.zeros(n)
    for t in range(1, n):
        x[t] = phi * x[t - 1] + rng.normal()
    return x + 10.0


def test_block_starts_pick_the_same_blocks_as_arch_moving_block_bootstrap():
    # arch.bootstrap.MovingBlockBootstrap (arch 8.0.0) with the same numpy Generator seed: same indices
    n, block, reps, seed = 50, 7, 25, 3
    arch_bs = MovingBlockBootstrap(block, np.arange(n), seed=np.random.default_rng(seed))
    arch_indices = np.array([arch_bs.update_indices() for _ in range(reps)])
    starts = moving_block_starts(n, block, reps, seed)
    ours = (starts[:, :, None] + np.arange(block)).reshape(reps, -1)[:, :n]  # last block cut at n
    np.testing.assert_array_equal(ours, arch_indices)


def test_replicates_and_interval_equal_arch_on_the_same_blocks():
    # the mean of each resample, with chunks that cut the replicate sequence, equals arch's apply(np.mean)
    x = ar1(97, 0.6, 1)
    block, reps, seed = 6, 1100, 11
    arch_bs = MovingBlockBootstrap(block, x, seed=np.random.default_rng(seed))
    reference = arch_bs.apply(np.mean, reps).ravel()
    ours = moving_block_replicates(x[:, None], lambda sums: sums[:, 0] / x.size, block, reps, seed, chunk=400)
    np.testing.assert_allclose(ours, reference, rtol=1e-12)
    low, high = percentile_interval(ours)
    np.testing.assert_allclose([low, high], np.quantile(reference, [0.025, 0.975]), rtol=1e-12)


def test_resampled_sums_are_the_sums_of_the_picked_rows():
    values = np.random.default_rng(2).normal(size=(23, 3))
    starts = moving_block_starts(23, 5, 4, 0)
    indices = (starts[:, :, None] + np.arange(5)).reshape(4, -1)[:, :23]
    np.testing.assert_allclose(resampled_sums(values, starts, 5), values[indices].sum(axis=1), rtol=1e-12)


def test_blocks_widen_the_interval_of_a_dependent_series_and_block_one_is_the_iid_bootstrap():
    x = ar1(600, 0.8, 5)
    mean = lambda sums: sums[:, 0] / x.size  # noqa: E731
    iid = percentile_interval(moving_block_replicates(x[:, None], mean, 1, 3000, 0))
    blocked = percentile_interval(moving_block_replicates(x[:, None], mean, 30, 3000, 0))
    # AR(1) with phi 0.8: the long-run variance is (1 + phi)/(1 - phi) = 9 times the iid one, so a blocked
    # interval is about 3 times wider (Kunsch 1989); independent resampling pretends the origins are iid.
    assert (blocked[1] - blocked[0]) > 2.0 * (iid[1] - iid[0])
    # block 1 is the ordinary percentile bootstrap: scipy.stats.bootstrap (percentile method) as reference
    data = np.random.default_rng(2).exponential(3.0, size=60)
    ours = percentile_interval(moving_block_replicates(data[:, None], lambda s: s[:, 0] / 60, 1, 4000, 0), 0.9)
    reference = sps.bootstrap((data,), np.mean, n_resamples=4000, confidence_level=0.9, method="percentile",
                              rng=np.random.default_rng(9)).confidence_interval
    standard_error = data.std(ddof=1) / np.sqrt(data.size)  # both are Monte Carlo: compare within 0.3 SE
    assert ours == pytest.approx((reference.low, reference.high), abs=0.3 * standard_error)


def test_block_length_covers_the_overlap_of_forecast_windows():
    assert block_length(24, 3, 500) == max(8, math.ceil(500 ** (1 / 3)))  # ceil(24/3) = 8 origins
    assert block_length(1, 1, 1000) == 10  # no overlap: the n^(1/3) rule (Hall, Horowitz & Jing 1995)
    assert block_length(24, 1, 10) == 10  # never longer than the series
    with pytest.raises(InputError):
        moving_block_starts(10, 11, 5, 0)
    with pytest.raises(InputError, match="bootstrap_samples"):
        moving_block_starts(10, 2, 0, 0)


def test_seed_interval_is_a_range_below_three_seeds_and_a_t_interval_from_three():
    assert seed_interval([1.0, 1.2]) == (1.0, 1.2, SEED_RANGE)
    assert seed_interval([1.5]) == (1.5, 1.5, SEED_RANGE)
    values = np.array([1.0, 1.3, 1.1, 1.25])
    low, high, kind = seed_interval(values)
    # scipy.stats.t.interval(0.95, n - 1, mean, standard error) as the reference
    reference = sps.t.interval(0.95, values.size - 1, loc=values.mean(), scale=sps.sem(values))
    assert (low, high) == pytest.approx(reference) and kind == SEED_CI
    assert "95% CI" not in SEED_RANGE
    assert np.isnan(seed_interval([np.nan])[0])
