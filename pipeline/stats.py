"""Statistics of the comparison grid: forecast-accuracy tests, multiplicity, rank tests and tallies.

Pure numpy/scipy/pandas functions: they read arrays or tables handed over by the aggregation step
and write nothing. No config keys are read here; levels, lags and horizons are explicit arguments.
Resampling (block bootstrap, seed intervals) lives in pipeline.resampling.

Sign convention everywhere: values are losses or errors, so smaller is better.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipeline.errors import InputError

ALTERNATIVES = ("two-sided", "less", "greater")


@dataclass(frozen=True)
class DMResult:
    """Outcome of a Diebold-Mariano test; `hln_statistic` is the one the p-value refers to."""

    statistic: float  # DM = mean(d) / sqrt(Newey-West variance of the mean), asymptotically N(0, 1)
    hln_statistic: float  # DM* = DM times the Harvey-Leybourne-Newbold factor with h = lags + 1
    p_value: float  # from Student t with `df` degrees of freedom
    df: int  # T - 1
    lags: int  # Bartlett lags of the variance
    n: int  # T: loss differences observed


def _finite_vector(values, name: str) -> np.ndarray:
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim != 1:
        raise InputError(f"expected a 1-D array, got shape {arr.shape}", field=name)
    bad = int(np.sum(~np.isfinite(arr)))
    if bad:
        raise InputError(f"{bad} of {arr.size} values are NaN or infinite; align and drop them "
                         f"first so the count is reported", field=name)
    return arr


def _lag_count(lags, name: str = "lags") -> int:
    if not isinstance(lags, (int, np.integer)) or isinstance(lags, bool) or lags < 0:
        raise InputError(f"must be an integer >= 0, got {lags!r}", field=name)
    return int(lags)


def dm_lag_order(horizon_hours: int, stride_hours: int) -> int:
    """Lags of the loss-differential autocovariance that forecast windows make: ceil(H / s) - 1.

    Windows whose origins are k strides apart share target hours while k * s < H, so their errors are
    correlated up to k = ceil(H / s) - 1 strides and (under the null of optimal forecasts) not beyond
    (Diebold & Mariano 1995: an h-step forecast error is MA(h - 1); here h is counted in strides).
    """
    for value, name in ((horizon_hours, "horizon_hours"), (stride_hours, "stride_hours")):
        if not isinstance(value, (int, np.integer)) or isinstance(value, bool) or value < 1:
            raise InputError(f"must be an integer >= 1, got {value!r}", field=name)
    return math.ceil(horizon_hours / stride_hours) - 1


def _positions(positions, size: int) -> np.ndarray:
    if positions is None:
        return np.arange(size, dtype=np.int64)
    arr = np.asarray(positions)
    if arr.shape != (size,) or not np.issubdtype(arr.dtype, np.integer):
        raise InputError(f"positions must be {size} integers (one per value), got {arr.dtype} {arr.shape}",
                         field="positions")
    if size > 1 and np.any(np.diff(arr) <= 0):
        raise InputError("positions must be strictly increasing (sort by origin, one value per origin)",
                         field="positions")
    return arr.astype(np.int64)


def hac_variance(d, lags: int, positions=None) -> float:
    """Newey-West (1987) variance of mean(d): (gamma_0 + 2 sum_{k=1}^{L} (1 - k/(L+1)) gamma_k) / T.

    gamma_k = (1/T) sum of c_t c_u over the pairs whose POSITIONS differ by exactly k (c = d - mean(d)),
    T = number of values. `positions` are the values' places on the stride grid (origin index in
    strides); None means contiguous. Origins dropped for missing data are not treated as contiguous: a
    pair that straddles a dropped origin is k + 1 (or more) strides apart and counts for that lag, and a
    dropped origin takes part in no pair. This equals the estimator on the full grid with the dropped
    values' centred value set to 0 (an "amplitude-modulated" series, Parzen 1963), i.e.
    V = z' W z / T^2 with W_ij = max(0, 1 - |i - j|/(L + 1)). W is a Bartlett (triangle) Toeplitz
    matrix, which is positive semi-definite (the triangle is the autocorrelation of a box), so V can
    never turn negative, with or without gaps. Without gaps this is statsmodels' OLS HAC variance of a
    constant with maxlags = L and use_correction = False (checked in tests/test_stats.py).
    Known cost: with L = h - 1 the Bartlett weights under-weight the autocovariances of an MA(h - 1)
    error, so V is biased low and the test rejects somewhat too often (about 11 % at a nominal 5 % for
    h = 4, T = 300 in tests/test_stats.py, against over 25 % when the overlap is ignored).
    """
    d = _finite_vector(d, "d")
    return float(hac_variances([d], [_lag_count(lags)], [_positions(positions, d.size)])[0])


def hac_variances(series: list[np.ndarray], lags: list[int], positions: list[np.ndarray]) -> np.ndarray:
    """`hac_variance` of many validated series at once (the grid runs thousands of tests): the series are laid
    end to end with a gap wider than any lag between them, so one searchsorted per lag finds every pair of
    every series and np.bincount sums each series' products. Same estimator, summed in another order
    (equal to the one-series loop to about 1e-15 relative)."""
    sizes = np.array([len(d) for d in series], dtype=np.int64)
    owner = np.repeat(np.arange(len(series)), sizes)
    values = np.concatenate(series).astype(np.float64)
    lag_of = np.asarray(lags, dtype=np.int64)
    most = int(lag_of.max()) if lag_of.size else 0
    span = np.array([int(p[-1]) + 1 if len(p) else 0 for p in positions], dtype=np.int64) + most + 1
    where = np.concatenate(positions).astype(np.int64) + np.repeat(np.cumsum(span) - span, sizes)
    centred = values - np.array([d.mean() for d in series])[owner]  # each series' own mean, as numpy gives it
    total = np.bincount(owner, centred * centred, len(series))
    for k in range(1, most + 1):
        partner = np.searchsorted(where, where + k)
        inside = partner < where.size
        match = np.zeros(where.size, dtype=bool)
        match[inside] = where[partner[inside]] == where[inside] + k
        weight = np.where(k <= lag_of, 1.0 - k / (lag_of + 1.0), 0.0)
        products = np.bincount(owner[match], centred[match] * centred[partner[match]], len(series))
        total += 2.0 * weight * products
    return total / sizes.astype(np.float64) ** 2


def _t_p_values(statistics: np.ndarray, df: np.ndarray, alternative: str) -> np.ndarray:
    from scipy import stats as sps  # imported here: `shiftgrid grid` starts faster
    if alternative == "two-sided":
        return 2.0 * sps.t.sf(np.abs(statistics), df)
    if alternative == "less":
        return sps.t.cdf(statistics, df)
    return sps.t.sf(statistics, df)


def diebold_mariano(d, lags: int, *, positions=None, alternative: str = "two-sided") -> DMResult:
    """Diebold-Mariano test (1995) with a Newey-West variance and the HLN (1997) small-sample factor.

    d_t = loss1_t - loss2_t in time order (e.g. absolute errors of two models on the same windows),
    lags = L from `dm_lag_order` (overlap of the forecast windows, in strides), positions = place of
    each value on the stride grid when origins are missing (see `hac_variance`).
    DM = mean(d) / sqrt(V). DM* = DM * sqrt((T + 1 - 2h + h(h-1)/T) / T) with h = L + 1; p from
    Student t with T - 1 df. alternative: "two-sided"; "less" = model 1 has the smaller expected loss;
    "greater" = model 2.

    Harvey, Leybourne & Newbold derived their factor for the rectangular-kernel variance with h - 1 lags.
    With L = 0 (windows that do not overlap) both variances are gamma_0 / T, the factor applies exactly
    and DM* is the one-sample t statistic. For L > 0 the Bartlett weights used here (so that V >= 0;
    the rectangular kernel can go negative) make the factor an approximation; we keep it with the
    t(T - 1) reference because it is below 1 for every h < T and so only makes the test more
    conservative in small samples, as HLN intended.
    Degenerate input: a constant d has no variance; d == 0 everywhere gives statistic 0 and p 1, a
    non-zero constant gives +-inf and p 0 (one model better at every origin by the same amount).
    """
    return diebold_mariano_many([d], [lags], [positions], alternative=alternative)[0]


def diebold_mariano_many(series: list, lags: list[int], positions: list | None = None, *,
                         alternative: str = "two-sided") -> list[DMResult]:
    """`diebold_mariano` of each series with its own lags and positions, computed together: the HAC
    variances in one pass (`hac_variances`) and the Student t p-values in one scipy call. Each series is
    checked as `diebold_mariano` checks one (the first bad one is the error)."""
    if alternative not in ALTERNATIVES:
        raise InputError(f"alternative must be one of {ALTERNATIVES}, got {alternative!r}",
                         field="alternative")
    positions = positions if positions is not None else [None] * len(series)
    checked, lag_counts, places = [], [], []
    for d, lag, where in zip(series, lags, positions):
        d = _finite_vector(d, "d")
        if d.size < 3:
            raise InputError(f"the Diebold-Mariano test needs at least 3 loss differences, got {d.size}",
                             field="d")
        lag = _lag_count(lag)
        if lag > d.size - 2:
            raise InputError(f"lags must be at most T - 2 = {d.size - 2} (the HLN factor vanishes at h = T), "
                             f"got {lag}", field="lags")
        checked.append(d)
        lag_counts.append(lag)
        places.append(_positions(where, d.size))
    if not checked:
        return []
    size = np.array([d.size for d in checked], dtype=np.int64)
    mean = np.array([d.mean() for d in checked])
    constant = np.array([np.ptp(d) == 0.0 for d in checked])
    variance = hac_variances(checked, lag_counts, places)
    degenerate = constant | (variance <= 0.0)  # V > 0 unless d is constant (up to rounding)
    with np.errstate(divide="ignore", invalid="ignore"):
        statistic = np.where(degenerate, np.where(mean == 0.0, 0.0, np.copysign(np.inf, mean)),
                             mean / np.sqrt(variance))
    h = np.asarray(lag_counts, dtype=np.int64) + 1
    hln = np.where(degenerate, statistic, statistic * np.sqrt((size + 1 - 2 * h + h * (h - 1) / size) / size))
    p_value = np.where(degenerate & (mean == 0.0), 1.0, _t_p_values(hln, size - 1, alternative))
    return [DMResult(float(statistic[i]), float(hln[i]), float(p_value[i]), int(size[i] - 1), lag_counts[i],
                     int(size[i])) for i in range(len(checked))]


def holm(p_values) -> np.ndarray:
    """Holm (1979) step-down adjusted p-values; NaN stays NaN and is not counted in the family.

    Sorted ascending p_(1) <= ... <= p_(m): adjusted p_(i) = max_{j <= i} min(1, (m - j + 1) p_(j)).
    Rejecting where the adjusted p is below alpha controls the family-wise error rate at alpha for any
    dependence between the tests (the DM tests of one grid share targets, so they are dependent).
    """
    arr = np.asarray(p_values, dtype=np.float64).ravel()
    finite = np.flatnonzero(np.isfinite(arr))
    if np.any((arr[finite] < 0) | (arr[finite] > 1)):
        raise InputError("p-values must lie in [0, 1]", field="p_values")
    adjusted = np.full(arr.shape, np.nan)
    order = finite[np.argsort(arr[finite], kind="stable")]
    m = order.size
    scaled = np.minimum(1.0, (m - np.arange(m)) * arr[order])
    adjusted[order] = np.maximum.accumulate(scaled)
    return adjusted


def friedman(errors) -> tuple[float, float, np.ndarray]:
    """Friedman test over N independent blocks (rows) x k methods (columns) of errors (Demsar 2006).

    Ranks within each row: the smallest error gets rank 1, ties get the average rank. Returns
    (chi2_F, p, mean_ranks); the statistic and its chi-squared p (k - 1 df) come from
    scipy.stats.friedmanchisquare (with the usual tie correction), which needs k >= 3: with two methods
    the Friedman test is a sign test, and the paired Diebold-Mariano tests say more. When every row is
    one big tie there is nothing to test: chi2 0, p 1.
    """
    from scipy import stats as sps  # imported here: `shiftgrid grid` starts faster
    table = np.asarray(errors, dtype=np.float64)
    if table.ndim != 2 or table.shape[0] < 2 or table.shape[1] < 3:
        raise InputError(f"Friedman test needs an (N >= 2, k >= 3) error table, got shape "
                         f"{table.shape}", field="errors")
    bad_rows = np.flatnonzero(~np.isfinite(table).all(axis=1))
    if bad_rows.size:
        raise InputError(f"{bad_rows.size} rows hold NaN/inf (first: row {bad_rows[0]}); drop "
                         f"incomplete blocks first so the count is reported", field="errors")
    mean_ranks = np.apply_along_axis(sps.rankdata, 1, table).mean(axis=0)
    if np.all(np.ptp(table, axis=1) == 0.0):
        return 0.0, 1.0, mean_ranks
    result = sps.friedmanchisquare(*table.T)
    return float(result.statistic), float(result.pvalue), mean_ranks


def iman_davenport(chi2: float, n: int, k: int) -> tuple[float, float, int, int]:
    """Iman-Davenport F from Friedman's chi2 (Demsar 2006, the equation after Friedman's statistic).

    F_F = (N - 1) chi2_F / (N (k - 1) - chi2_F), F-distributed with (k - 1, (k - 1)(N - 1)) df; less
    conservative than chi2_F. Returns (F_F, p, df1, df2). chi2_F reaches N (k - 1) when every block
    ranks the methods the same way: F_F is then infinite and p 0.
    """
    from scipy import stats as sps  # imported here: `shiftgrid grid` starts faster
    if not isinstance(n, (int, np.integer)) or n < 2 or not isinstance(k, (int, np.integer)) or k < 2:
        raise InputError(f"needs N >= 2 blocks and k >= 2 methods, got N={n!r}, k={k!r}", field="n")
    df1, df2 = k - 1, (k - 1) * (n - 1)
    denominator = n * (k - 1) - chi2
    if denominator <= 0.0:
        return float("inf"), 0.0, df1, df2
    statistic = (n - 1) * chi2 / denominator
    return float(statistic), float(sps.f.sf(statistic, df1, df2)), df1, df2


def nemenyi_q(k: int, alpha: float = 0.05) -> float:
    """Nemenyi critical value q_alpha: studentized range quantile (k, inf df) / sqrt(2)."""
    from scipy import stats as sps  # imported here: `shiftgrid grid` starts faster
    if not isinstance(k, (int, np.integer)) or k < 2:
        raise InputError(f"the Nemenyi test needs k >= 2 methods, got {k!r}", field="k")
    if not 0.0 < alpha < 1.0:
        raise InputError(f"alpha must lie in (0, 1), got {alpha}", field="alpha")
    return float(sps.studentized_range.ppf(1.0 - alpha, k, np.inf) / np.sqrt(2.0))


def nemenyi_cd(k: int, n: int, alpha: float = 0.05) -> float:
    """Nemenyi critical difference of mean ranks, CD = q_alpha sqrt(k(k+1)/(6n)) (Demsar 2006)."""
    if not isinstance(n, (int, np.integer)) or n < 1:
        raise InputError(f"the number of blocks n must be a positive integer, got {n!r}",
                         field="n")
    return nemenyi_q(k, alpha) * float(np.sqrt(k * (k + 1) / (6.0 * n)))


def rank_within(df: pd.DataFrame, group_cols: list[str], value_col: str) -> pd.Series:
    """Rank `value_col` within each group of `group_cols`: smallest = 1, ties averaged, NaN kept.

    Returns a float Series aligned with df.index (assign it as a column), so the input is untouched.
    """
    missing = [col for col in [*group_cols, value_col] if col not in df.columns]
    if missing:
        raise InputError(f"missing columns {missing}", field="rank_within")
    if not group_cols:
        return df[value_col].rank(method="average", ascending=True)
    return df.groupby(list(group_cols), dropna=False)[value_col].rank(method="average",
                                                                      ascending=True)


TIE_TOLERANCE = 0.01  # a penalty within 1 % of its ERM twin's mean neither wins nor loses


def win_tie_loss(a, b, rel_tol: float = TIE_TOLERANCE) -> dict[str, int]:
    """Tally paired errors of method a against method b (smaller error wins).

    A pair is a tie when |a - b| <= rel_tol * max(|a|, |b|) (both 0 is a tie). Pairs with a NaN on
    either side are not judged but counted under "missing", so nothing disappears from the tally.
    Returns {"wins", "ties", "losses", "missing"} from a's point of view.
    """
    return {key: int(np.sum(outcome_codes(a, b, rel_tol) == code))
            for key, code in (("wins", -1), ("ties", 0), ("losses", 1), ("missing", 2))}


def outcome_codes(a, b, rel_tol: float = TIE_TOLERANCE) -> np.ndarray:
    """Per pair: -1 a wins (smaller error), 0 tie (see `win_tie_loss`), 1 a loses, 2 not judged (NaN)."""
    first = np.asarray(a, dtype=np.float64).ravel()
    second = np.asarray(b, dtype=np.float64).ravel()
    if first.shape != second.shape:
        raise InputError(f"a has {first.size} values but b has {second.size}", field="b")
    if rel_tol < 0:
        raise InputError(f"rel_tol must be >= 0, got {rel_tol}", field="rel_tol")
    codes = np.full(first.shape, 2, dtype=np.int64)
    judged = np.isfinite(first) & np.isfinite(second)
    tie = np.abs(first - second) <= rel_tol * np.maximum(np.abs(first), np.abs(second))
    codes[judged & tie] = 0
    codes[judged & ~tie & (first < second)] = -1
    codes[judged & ~tie & (first > second)] = 1
    return codes


def relative_change(new, base):
    """(new - base) / |base|: for errors, negative means the new method is better.

    Works on scalars and arrays. A zero base has no relative scale: NaN there.
    """
    new_arr = np.asarray(new, dtype=np.float64)
    base_arr = np.asarray(base, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        change = np.where(base_arr != 0, (new_arr - base_arr) / np.abs(base_arr), np.nan)
    return float(change) if change.ndim == 0 else change
