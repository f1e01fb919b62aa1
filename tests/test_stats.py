"""Grid statistics against published formulas (Diebold & Mariano 1995; Harvey, Leybourne & Newbold 1997;
Newey & West 1987; Holm 1979; Demsar 2006) and reference libraries (scipy, statsmodels)."""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats as sps
from statsmodels.stats.multitest import multipletests

from pipeline.errors import InputError
from pipeline.stats import (DMResult, diebold_mariano, diebold_mariano_many, dm_lag_order, friedman, hac_variance,
                            hac_variances, holm, iman_davenport, nemenyi_cd, nemenyi_q, rank_within, relative_change,
                            win_tie_loss)

# Loss differences (T = 16); the check values below were computed with numpy/scipy, not published.
D = np.array([0.5, 0.9, 0.7, -0.2, 0.1, 0.6, 1.0, 0.8, 0.3, -0.4, 0.2, 0.9, 0.6, 0.4, -0.1, 0.5])

# Error table (N = 6 blocks x k = 4 methods); check values computed with scipy.
ERRORS = np.array([[.21, .25, .19, .30], [.15, .18, .16, .22], [.33, .31, .29, .40],
                   [.12, .17, .11, .16], [.45, .50, .44, .47], [.27, .26, .24, .35]])


def statsmodels_hac(d: np.ndarray, lags: int):
    """OLS of d on a constant with a Newey-West (Bartlett) HAC covariance: the reference for our variance.
    use_correction=False keeps statsmodels' divisor T, the one of Diebold & Mariano (1995)."""
    return sm.OLS(d, np.ones(d.size)).fit(cov_type="HAC", cov_kwds={"maxlags": lags, "use_correction": False})


def test_dm_without_overlap_matches_computed_values_and_the_one_sample_t_test():
    # Diebold & Mariano (1995) JBES 13(3) + Harvey, Leybourne & Newbold (1997) IJF 13(2); values computed
    # with numpy/scipy for L = 0 lags (h = 1, rectangular = Bartlett kernel): DM 4.225314, DM* 4.091143,
    # p(t, 15 df, two-sided) 9.634e-4.
    result = diebold_mariano(D, 0)
    assert isinstance(result, DMResult)
    assert result.statistic == pytest.approx(4.225314, abs=1e-6)
    assert result.hln_statistic == pytest.approx(4.091143, abs=1e-6)
    assert result.p_value == pytest.approx(9.634e-4, rel=1e-3)
    assert (result.df, result.lags, result.n) == (15, 0, 16)
    # with L = 0 the HLN statistic is the one-sample t statistic (scipy.stats.ttest_1samp)
    reference = sps.ttest_1samp(D, 0.0)
    assert result.hln_statistic == pytest.approx(reference.statistic, rel=1e-12)
    assert result.p_value == pytest.approx(reference.pvalue, rel=1e-10)


@pytest.mark.parametrize("lags", [0, 1, 2, 3, 5, 8])
def test_newey_west_variance_and_dm_statistic_equal_statsmodels_hac(lags):
    # statsmodels OLS(d, const).fit(cov_type="HAC", maxlags=L, use_correction=False): bse^2 = our V,
    # t-value = our DM statistic (Newey & West 1987 Bartlett weights 1 - k/(L+1)).
    reference = statsmodels_hac(D, lags)
    assert hac_variance(D, lags) == pytest.approx(reference.bse[0] ** 2, rel=1e-12)
    assert diebold_mariano(D, lags).statistic == pytest.approx(reference.tvalues[0], rel=1e-12)


def test_hln_factor_uses_h_equal_lags_plus_one():
    # Harvey, Leybourne & Newbold (1997): DM* = DM sqrt((T + 1 - 2h + h(h - 1)/T) / T); here h = L + 1
    result = diebold_mariano(D, 2)
    h, T = 3, 16
    assert result.hln_statistic == pytest.approx(result.statistic * np.sqrt((T + 1 - 2 * h + h * (h - 1) / T) / T))
    assert result.p_value == pytest.approx(2 * sps.t.sf(abs(result.hln_statistic), 15))


def test_variance_never_turns_negative_where_the_rectangular_kernel_does():
    # computed with numpy: the rectangular (truncated) kernel with 3 lags gives V = -0.009346 on D;
    # Bartlett weights cannot (Newey & West 1987) and equal statsmodels' value there.
    centred = D - D.mean()
    gammas = [centred[k:] @ centred[:16 - k] / 16 for k in range(4)]
    assert (gammas[0] + 2 * sum(gammas[1:])) / 16 == pytest.approx(-0.009346, abs=1e-6)
    assert hac_variance(D, 3) == pytest.approx(statsmodels_hac(D, 3).bse[0] ** 2, rel=1e-12) and hac_variance(D, 3) > 0
    # an alternating series maximises negative autocorrelation; every lag order stays >= 0, gaps or not
    rng = np.random.default_rng(4)
    for _ in range(50):
        d = np.where(np.arange(40) % 2, 1.0, -1.0) + rng.normal(0, 0.3, 40)
        positions = np.sort(rng.choice(60, size=40, replace=False))
        for lags in (1, 2, 5, 11, 38):
            assert hac_variance(d, lags) >= 0 and hac_variance(d, lags, positions) >= 0


def test_missing_origins_are_not_treated_as_contiguous():
    # Origins 0..9 with 3 and 4 dropped: pairs count for a lag only when their positions are k apart.
    d = np.array([0.3, -0.1, 0.4, 0.8, 0.2, -0.5, 0.6, 0.1])
    positions = np.array([0, 1, 2, 5, 6, 7, 8, 9])
    lags = 2
    # Independent formula: the zero-filled centred series on the full grid in the Bartlett quadratic form
    # V = z' W z / T^2, W_ij = max(0, 1 - |i - j| / (L + 1)) (Newey & West 1987; amplitude-modulated series).
    z = np.zeros(10)
    z[positions] = d - d.mean()
    grid = np.arange(10)
    weights = np.maximum(0.0, 1.0 - np.abs(grid[:, None] - grid[None, :]) / (lags + 1))
    assert hac_variance(d, lags, positions) == pytest.approx(z @ weights @ z / d.size ** 2, rel=1e-12)
    # ... which is not what treating the 8 values as contiguous gives (that would pair 2 with 5 at lag 1)
    assert hac_variance(d, lags, positions) != pytest.approx(hac_variance(d, lags), rel=1e-3)
    with pytest.raises(InputError, match="strictly increasing"):
        hac_variance(d, lags, positions[::-1].copy())


def test_lag_order_follows_the_overlap_of_forecast_windows():
    # ceil(H / s) - 1: windows k strides apart share target hours while k * s < H
    assert [dm_lag_order(h, s) for h, s in ((24, 1), (24, 3), (1, 1), (6, 4), (24, 24), (25, 24), (6, 3))] == \
        [23, 7, 0, 1, 0, 1, 1]
    with pytest.raises(InputError):
        dm_lag_order(24, 0)


def test_overlapping_windows_with_the_right_lags_keep_the_size_of_the_test():
    # Under the null, 4-step errors of a stride-1 forecast are MA(3) (Diebold & Mariano 1995). With
    # dm_lag_order(4, 1) = 3 Bartlett lags the 5 % test rejects about 11 % of the time here: Bartlett weights
    # (3/4, 1/2, 1/4) under-weight the MA(3) autocovariances, the price of a variance that cannot go negative
    # (documented in pipeline.stats). Ignoring the overlap (0 lags) rejects several times more often.
    rng = np.random.default_rng(0)
    rejects = {0: 0, 3: 0}
    reps = 400
    for _ in range(reps):
        shocks = rng.normal(size=303)
        d = shocks[3:] + shocks[2:-1] + shocks[1:-2] + shocks[:-3]  # sum of 4 overlapping hours, mean 0
        for lags in rejects:
            rejects[lags] += diebold_mariano(d, lags).p_value < 0.05
    assert rejects[3] / reps < 0.15  # binomial sd at 11 % over 400 runs is 1.6 %
    assert rejects[0] / reps > 0.25 and rejects[0] > 2 * rejects[3]


def test_dm_one_sided_alternatives_and_degenerate_series():
    greater = diebold_mariano(D, 1, alternative="greater").p_value
    less = diebold_mariano(D, 1, alternative="less").p_value
    assert greater + less == pytest.approx(1.0)
    assert greater == pytest.approx(diebold_mariano(D, 1).p_value / 2.0)
    assert diebold_mariano(np.zeros(10), 3) == DMResult(0.0, 0.0, 1.0, 9, 3, 10)
    constant = diebold_mariano(np.full(10, -0.5), 2)
    assert constant.statistic == -np.inf and constant.p_value == 0.0
    with pytest.raises(InputError):
        diebold_mariano(np.array([0.1, np.nan, 0.2]), 1)
    with pytest.raises(InputError, match="lags must be at most T - 2"):
        diebold_mariano(D, 15)
    with pytest.raises(InputError):
        diebold_mariano(D, 1, alternative="bigger")


def test_holm_matches_statsmodels_multipletests():
    # statsmodels.stats.multitest.multipletests(method="holm") is the reference (Holm 1979)
    rng = np.random.default_rng(8)
    for size in (1, 2, 7, 30):
        p = rng.uniform(0, 0.2, size) ** 2
        np.testing.assert_allclose(holm(p), multipletests(p, method="holm")[1], rtol=1e-12)
    # NaN (no test) is not part of the family
    p = np.array([0.01, np.nan, 0.04, 0.03])
    expected = multipletests([0.01, 0.04, 0.03], method="holm")[1]
    np.testing.assert_allclose(holm(p)[[0, 2, 3]], expected)
    assert np.isnan(holm(p)[1])
    with pytest.raises(InputError):
        holm([0.5, 1.5])


def test_friedman_and_iman_davenport_match_demsar_example_and_scipy():
    # Demsar (2006) JMLR 7:1-30; values computed with scipy: mean ranks (2.16667, 3.0, 1.16667, 3.66667),
    # chi2_F 12.6 (= scipy.stats.friedmanchisquare), p 0.0055865
    chi2, p_value, mean_ranks = friedman(ERRORS)
    np.testing.assert_allclose(mean_ranks, [2.16667, 3.0, 1.16667, 3.66667], atol=1e-5)
    assert chi2 == pytest.approx(12.6)
    assert p_value == pytest.approx(0.0055865, rel=1e-4)
    reference = sps.friedmanchisquare(*ERRORS.T)
    assert (chi2, p_value) == pytest.approx((reference.statistic, reference.pvalue))
    # Demsar (2006), the equation after Friedman's statistic: F_F = (N-1) chi2 / (N(k-1) - chi2) with
    # (k-1, (k-1)(N-1)) df; computed: 5 * 12.6 / (18 - 12.6) = 11.6667, p = scipy.stats.f.sf(., 3, 15)
    f_stat, f_p, df1, df2 = iman_davenport(chi2, 6, 4)
    assert f_stat == pytest.approx(11.666667, rel=1e-6) and (df1, df2) == (3, 15)
    assert f_p == pytest.approx(sps.f.sf(11.666667, 3, 15), rel=1e-5) and f_p < p_value
    # perfect agreement of all blocks: chi2 = N(k-1), F infinite
    assert iman_davenport(18.0, 6, 4)[:2] == (float("inf"), 0.0)


def test_friedman_ties_and_bad_input():
    rng = np.random.default_rng(5)
    tied = rng.integers(0, 4, size=(12, 5)).astype(float)  # many ties within rows
    chi2, p_value, mean_ranks = friedman(tied)
    reference = sps.friedmanchisquare(*tied.T)  # scipy applies the tie correction
    assert (chi2, p_value) == pytest.approx((reference.statistic, reference.pvalue))
    assert mean_ranks.sum() == pytest.approx(5 * 6 / 2)  # ranks 1..k average out per row
    assert friedman(np.ones((4, 3)))[:2] == (0.0, 1.0)
    with pytest.raises(InputError):
        friedman(np.array([[0.1, np.nan, 0.3], [0.2, 0.3, 0.1]]))
    with pytest.raises(InputError, match="k >= 3"):
        friedman(np.array([[0.1, 0.2], [0.2, 0.3]]))


def test_nemenyi_critical_values_match_demsar_table_5():
    # Demsar (2006) Table 5, q_0.05 for k = 2..10 (published)
    table5 = [1.960, 2.343, 2.569, 2.728, 2.850, 2.949, 3.031, 3.102, 3.164]
    for k, published in zip(range(2, 11), table5):
        assert nemenyi_q(k, 0.05) == pytest.approx(published, abs=1e-3)
    # Demsar (2006) CD = q sqrt(k(k+1)/(6N)); computed for k = 4, N = 6: 1.9148
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


def test_win_tie_loss_and_relative_change():
    a = np.array([1.00, 0.50, 2.00, 1.000, np.nan, 0.0])
    b = np.array([1.20, 0.40, 2.01, 0.995, 1.0, 0.0])
    assert win_tie_loss(a, b) == {"wins": 1, "ties": 3, "losses": 1, "missing": 1}
    assert win_tie_loss(a, b, rel_tol=0.0) == {"wins": 2, "ties": 1, "losses": 2, "missing": 1}
    assert relative_change(0.9, 1.0) == pytest.approx(-0.1)
    np.testing.assert_allclose(relative_change([1.5, 1.0], [1.0, 0.0]), [0.5, np.nan])
    assert relative_change(-1.0, -2.0) == pytest.approx(0.5)


def test_many_series_at_once_give_each_series_its_own_variance_and_test():
    """The batch lays series end to end: no pair may straddle two series, and each keeps its own lags and gaps.
    Reference: the quadratic form z' W z / T^2 of each series alone (Newey & West 1987), as above."""
    rng = np.random.default_rng(7)
    series, lags, places = [], [], []
    for size, lag in ((12, 0), (30, 3), (9, 2), (50, 1)):
        places.append(np.sort(rng.choice(size + 5, size, replace=False)))
        series.append(rng.normal(0.1, 1.0, size))
        lags.append(lag)
    variances = hac_variances(series, lags, places)
    for d, lag, where, variance in zip(series, lags, places, variances):
        z = np.zeros(where[-1] + 1)
        z[where] = d - d.mean()
        grid = np.arange(z.size)
        weights = np.maximum(0.0, 1.0 - np.abs(grid[:, None] - grid[None, :]) / (lag + 1))
        assert variance == pytest.approx(z @ weights @ z / d.size ** 2, rel=1e-12)
    alone = [diebold_mariano(d, lag, positions=where) for d, lag, where in zip(series, lags, places)]
    for one, together in zip(alone, diebold_mariano_many(series, lags, places)):
        assert together.p_value == pytest.approx(one.p_value, rel=1e-12) and together.lags == one.lags
    constant = diebold_mariano_many([np.zeros(5), np.full(5, 0.5)], [1, 1])
    assert (constant[0].statistic, constant[0].p_value) == (0.0, 1.0) and constant[1].p_value == 0.0
