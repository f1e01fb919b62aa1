"""Grid statistics against published values (Diebold & Mariano 1995; Harvey, Leybourne & Newbold 1997; Demsar 2006) and scipy."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from pipeline.errors import InputError
from pipeline.stats import (DMResult, _long_run_variance, bootstrap_ci, diebold_mariano, friedman,
                            nemenyi_cd, nemenyi_q, rank_within, relative_change, win_tie_loss)

# Loss differences computed with numpy (T = 16)
D = np.array([0.5, 0.9, 0.7, -0.2, 0.1, 0.6, 1.0, 0.8, 0.3, -0.4, 0.2, 0.9, 0.6, 0.4, -0.1, 0.5])

# Error table computed with scipy (N = 6 problems x k = 4 methods)
ERRORS = np.array([[.21, .25, .19, .30], [.15, .18, .16, .22], [.33, .31, .29, .40],
                   [.12, .17, .11, .16], [.45, .50, .44, .47], [.27, .26, .24, .35]])


def test_dm_h1_matches_published_values_and_one_sample_t_test():
    # Diebold & Mariano (1995) + Harvey, Leybourne & Newbold (1997); values computed with numpy and scipy
    result = diebold_mariano(D, 1)
    assert isinstance(result, DMResult)
    assert result.statistic == pytest.approx(4.225314, abs=1e-6)
    assert result.hln_statistic == pytest.approx(4.091143, abs=1e-6)
    assert result.p_value == pytest.approx(9.634e-4, rel=1e-3)
    assert result.df == 15 and not result.variance_fallback
    # with h = 1 the HLN statistic is the one-sample t statistic (scipy.stats.ttest_1samp)
    reference = sps.ttest_1samp(D, 0.0)
    assert result.hln_statistic == pytest.approx(reference.statistic, rel=1e-12)
    assert result.p_value == pytest.approx(reference.pvalue, rel=1e-10)


def test_dm_h2_matches_published_values():
    # Harvey, Leybourne & Newbold (1997) correction; computed with numpy, h = 2
    result = diebold_mariano(D, 2)
    assert result.statistic == pytest.approx(3.452733, abs=1e-6)
    assert result.hln_statistic == pytest.approx(3.127179, abs=1e-6)
    assert result.p_value == pytest.approx(6.922e-3, rel=1e-3)
    assert not result.variance_fallback


def test_dm_negative_variance_falls_back_to_h1_and_says_so():
    # computed with numpy: h = 4 gives V = -0.009346 <= 0 for this series
    assert _long_run_variance(D, 4) == pytest.approx(-0.009346, abs=1e-6)
    result = diebold_mariano(D, 4)
    assert result.variance_fallback
    h1 = diebold_mariano(D, 1)
    assert (result.statistic, result.hln_statistic, result.p_value) == (
        h1.statistic, h1.hln_statistic, h1.p_value)


def test_dm_one_sided_alternatives_and_degenerate_series():
    greater = diebold_mariano(D, 2, alternative="greater").p_value
    less = diebold_mariano(D, 2, alternative="less").p_value
    assert greater + less == pytest.approx(1.0)
    assert greater == pytest.approx(diebold_mariano(D, 2).p_value / 2.0)
    assert diebold_mariano(np.zeros(10), 3) == DMResult(0.0, 0.0, 1.0, 9, False)
    constant = diebold_mariano(np.full(10, -0.5), 2)
    assert constant.statistic == -np.inf and constant.p_value == 0.0
    with pytest.raises(InputError):
        diebold_mariano(np.array([0.1, np.nan, 0.2]), 1)
    with pytest.raises(InputError):
        diebold_mariano(D, 16)
    with pytest.raises(InputError):
        diebold_mariano(D, 1, alternative="bigger")


def test_friedman_matches_demsar_example_and_scipy():
    # Demsar (2006) JMLR 7 formula; values computed with scipy
    chi2, p_value, mean_ranks = friedman(ERRORS)
    np.testing.assert_allclose(mean_ranks, [2.16667, 3.0, 1.16667, 3.66667], atol=1e-5)
    assert chi2 == pytest.approx(12.6)
    assert p_value == pytest.approx(0.0055865, rel=1e-4)
    # scipy.stats.friedmanchisquare takes one sample per method
    reference = sps.friedmanchisquare(*ERRORS.T)
    assert chi2 == pytest.approx(reference.statistic)
    assert p_value == pytest.approx(reference.pvalue)


def test_friedman_tie_correction_matches_scipy():
    rng = np.random.default_rng(5)
    tied = rng.integers(0, 4, size=(12, 5)).astype(float)  # many ties within rows
    chi2, p_value, mean_ranks = friedman(tied)
    reference = sps.friedmanchisquare(*tied.T)  # scipy applies the tie correction too
    assert chi2 == pytest.approx(reference.statistic)
    assert p_value == pytest.approx(reference.pvalue)
    assert mean_ranks.sum() == pytest.approx(5 * 6 / 2)  # ranks 1..k average out per row
    assert friedman(np.ones((4, 3)))[:2] == (0.0, 1.0)
    with pytest.raises(InputError):
        friedman(np.array([[0.1, np.nan], [0.2, 0.3]]))


def test_nemenyi_critical_values_match_demsar_table_5():
    # Demsar (2006) Table 5, q_0.05 for k = 2..10
    table5 = [1.960, 2.343, 2.569, 2.728, 2.850, 2.949, 3.031, 3.102, 3.164]
    for k, published in zip(range(2, 11), table5):
        assert nemenyi_q(k, 0.05) == pytest.approx(published, abs=1e-3)
    # computed with scipy: CD(0.05) for k = 4, N = 6
    assert nemenyi_cd(4, 6) == pytest.approx(1.9148, abs=1e-4)
    assert nemenyi_cd(4, 24) == pytest.approx(nemenyi_cd(4, 6) / 2.0)


def test_rank_within_groups_ties_and_nan():
    frame = pd.DataFrame({"split": ["s1"] * 4 + ["s2"] * 3,
                          "mase": [0.9, 0.7, 0.7, 1.2, 0.5, np.nan, 0.4]})
    ranks = rank_within(frame, ["split"], "mase")
    np.testing.assert_array_equal(ranks.to_numpy(), [3.0, 1.5, 1.5, 4.0, 2.0, np.nan, 1.0])
    assert ranks.index.equals(frame.index) and "rank" not in frame
    # within one group it agrees with scipy.stats.rankdata (average ties)
    np.testing.assert_array_equal(ranks[:4], sps.rankdata(frame["mase"][:4]))
    with pytest.raises(InputError):
        rank_within(frame, ["model"], "mase")


def test_bootstrap_ci_contains_mean_is_seeded_and_narrows():
    rng = np.random.default_rng(1)
    small, large = rng.normal(10.0, 2.0, size=20), rng.normal(10.0, 2.0, size=2000)
    low, high = bootstrap_ci(small)
    assert low < small.mean() < high
    assert bootstrap_ci(small, seed=3) == bootstrap_ci(small, seed=3)
    assert bootstrap_ci(small, seed=3) != bootstrap_ci(small, seed=4)
    large_low, large_high = bootstrap_ci(large)
    assert (large_high - large_low) < (high - low) / 4.0  # width ~ 1/sqrt(n): 10x narrower here
    assert bootstrap_ci([4.2]) == (4.2, 4.2)
    with pytest.raises(InputError):
        bootstrap_ci([])


def test_bootstrap_ci_agrees_with_scipy_percentile_bootstrap():
    data = np.random.default_rng(2).exponential(3.0, size=60)
    ours = bootstrap_ci(data, n_boot=4000, level=0.9, seed=0)
    # scipy.stats.bootstrap, percentile method; both are Monte Carlo, so compare to a fraction of SE
    reference = sps.bootstrap((data,), np.mean, n_resamples=4000, confidence_level=0.9,
                              method="percentile", rng=np.random.default_rng(9))
    standard_error = data.std(ddof=1) / np.sqrt(data.size)
    assert ours[0] == pytest.approx(reference.confidence_interval.low, abs=0.3 * standard_error)
    assert ours[1] == pytest.approx(reference.confidence_interval.high, abs=0.3 * standard_error)


def test_win_tie_loss_and_relative_change():
    a = np.array([1.00, 0.50, 2.00, 1.000, np.nan, 0.0])
    b = np.array([1.20, 0.40, 2.01, 0.995, 1.0, 0.0])
    assert win_tie_loss(a, b) == {"wins": 1, "ties": 3, "losses": 1, "missing": 1}
    assert win_tie_loss(a, b, rel_tol=0.0) == {"wins": 2, "ties": 1, "losses": 2, "missing": 1}
    assert relative_change(0.9, 1.0) == pytest.approx(-0.1)
    np.testing.assert_allclose(relative_change([1.5, 1.0], [1.0, 0.0]), [0.5, np.nan])
    assert relative_change(-1.0, -2.0) == pytest.approx(0.5)
