"""Statistics of the comparison grid: forecast-accuracy tests, rank tests, intervals and tallies.

Pure numpy/scipy/pandas functions: they read arrays or tables handed over by the aggregation step
and write nothing. No config keys are read here; levels, horizons and seeds are explicit arguments.

Sign convention everywhere: values are losses or errors, so smaller is better.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats as sps

from pipeline.errors import InputError

ALTERNATIVES = ("two-sided", "less", "greater")


@dataclass(frozen=True)
class DMResult:
    """Outcome of a Diebold-Mariano test; `hln_statistic` is the one the p-value refers to."""

    statistic: float  # DM, asymptotically N(0, 1)
    hln_statistic: float  # DM* with the Harvey-Leybourne-Newbold small-sample factor
    p_value: float  # from Student t with `df` degrees of freedom
    df: int  # T - 1
    variance_fallback: bool  # True when the long-run variance was <= 0 and h = 1 was used instead


def _finite_vector(values, name: str) -> np.ndarray:
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim != 1:
        raise InputError(f"expected a 1-D array, got shape {arr.shape}", field=name)
    bad = int(np.sum(~np.isfinite(arr)))
    if bad:
        raise InputError(f"{bad} of {arr.size} values are NaN or infinite; align and drop them "
                         f"first so the count is reported", field=name)
    return arr


def _long_run_variance(d: np.ndarray, h: int) -> float:
    """(gamma_0 + 2 sum_{k=1}^{h-1} gamma_k) / T with autocovariances of divisor T."""
    size = d.size
    centred = d - d.mean()
    gammas = [float(np.dot(centred[k:], centred[:size - k])) / size for k in range(h)]
    return (gammas[0] + 2.0 * sum(gammas[1:])) / size


def _t_p_value(statistic: float, df: int, alternative: str) -> float:
    if alternative == "two-sided":
        return float(2.0 * sps.t.sf(abs(statistic), df))
    if alternative == "less":
        return float(sps.t.cdf(statistic, df))
    return float(sps.t.sf(statistic, df))


def diebold_mariano(d, h: int, *, alternative: str = "two-sided") -> DMResult:
    """Diebold-Mariano test (1995) with the Harvey-Leybourne-Newbold (1997) correction.

    d_t = loss1_t - loss2_t in time order (e.g. squared errors of two models on the same windows),
    h = forecast horizon in steps (h - 1 autocovariance lags enter the variance).
    DM = mean(d) / sqrt(V), V = (gamma_0 + 2 sum_{k=1}^{h-1} gamma_k) / T (divisor T);
    DM* = DM * sqrt((T + 1 - 2h + h(h-1)/T) / T); p from Student t with T - 1 df.
    alternative: "two-sided"; "less" = model 1 has the smaller expected loss; "greater" = model 2.

    Fallback: with h > 1 the truncated variance estimate V can be <= 0. The test is then re-run with
    h = 1 (gamma_0 only, and the h = 1 correction factor) and `variance_fallback` is True; the same
    choice as the R forecast package's dm.test [from memory].
    Degenerate input: when d is constant there is no variance at all; d == 0 everywhere gives
    statistic 0 and p 1 (no difference), a non-zero constant gives +-inf and p 0 (one model is
    better at every step by the same amount).
    """
    d = _finite_vector(d, "d")
    if alternative not in ALTERNATIVES:
        raise InputError(f"alternative must be one of {ALTERNATIVES}, got {alternative!r}",
                         field="alternative")
    size = d.size
    if size < 2:
        raise InputError(f"the Diebold-Mariano test needs at least 2 loss differences, got {size}",
                         field="d")
    if not isinstance(h, (int, np.integer)) or isinstance(h, bool) or not 1 <= h < size:
        raise InputError(f"horizon h must be an integer in [1, {size - 1}], got {h!r}", field="h")
    df = size - 1
    mean = float(d.mean())
    if np.ptp(d) == 0.0:
        if mean == 0.0:
            return DMResult(0.0, 0.0, 1.0, df, False)
        infinite = float(np.copysign(np.inf, mean))
        return DMResult(infinite, infinite, _t_p_value(infinite, df, alternative), df, False)
    variance = _long_run_variance(d, h)
    fallback = variance <= 0.0
    if fallback:
        h = 1
        variance = _long_run_variance(d, 1)
    statistic = mean / np.sqrt(variance)
    correction = np.sqrt((size + 1 - 2 * h + h * (h - 1) / size) / size)
    hln = float(statistic * correction)
    return DMResult(float(statistic), hln, _t_p_value(hln, df, alternative), df, bool(fallback))


def friedman(errors) -> tuple[float, float, np.ndarray]:
    """Friedman test over N problems (rows) x k methods (columns) of errors (Demsar 2006).

    Ranks within each row: the smallest error gets rank 1, ties get the average rank. Returns
    (chi2_F, p, mean_ranks) with p from chi-squared with k - 1 df. chi2_F carries the usual tie
    correction (divide by 1 - sum(t^3 - t) / (N k (k^2 - 1)), as scipy.stats.friedmanchisquare
    does); without ties it is Demsar's 12N/(k(k+1)) (sum R_j^2 - k(k+1)^2/4). When every row is one
    big tie there is nothing to test: chi2 0, p 1.
    """
    table = np.asarray(errors, dtype=np.float64)
    if table.ndim != 2 or table.shape[0] < 2 or table.shape[1] < 2:
        raise InputError(f"Friedman test needs an (N >= 2, k >= 2) error table, got shape "
                         f"{table.shape}", field="errors")
    bad_rows = np.flatnonzero(~np.isfinite(table).all(axis=1))
    if bad_rows.size:
        raise InputError(f"{bad_rows.size} rows hold NaN/inf (first: row {bad_rows[0]}); drop "
                         f"incomplete problems first so the count is reported", field="errors")
    n_rows, k = table.shape
    ranks = np.apply_along_axis(sps.rankdata, 1, table)
    mean_ranks = ranks.mean(axis=0)
    chi2 = 12.0 * n_rows / (k * (k + 1)) * (np.sum(mean_ranks ** 2) - k * (k + 1) ** 2 / 4.0)
    tie_sizes = [np.unique(row, return_counts=True)[1] for row in table]
    tie_term = sum(float(np.sum(sizes ** 3 - sizes)) for sizes in tie_sizes)
    denominator = 1.0 - tie_term / (n_rows * k * (k * k - 1))
    if denominator <= 0.0:
        return 0.0, 1.0, mean_ranks
    chi2 = float(chi2 / denominator)
    return chi2, float(sps.chi2.sf(chi2, k - 1)), mean_ranks


def nemenyi_q(k: int, alpha: float = 0.05) -> float:
    """Nemenyi critical value q_alpha: studentized range quantile (k, inf df) / sqrt(2)."""
    if not isinstance(k, (int, np.integer)) or k < 2:
        raise InputError(f"the Nemenyi test needs k >= 2 methods, got {k!r}", field="k")
    if not 0.0 < alpha < 1.0:
        raise InputError(f"alpha must lie in (0, 1), got {alpha}", field="alpha")
    return float(sps.studentized_range.ppf(1.0 - alpha, k, np.inf) / np.sqrt(2.0))


def nemenyi_cd(k: int, n: int, alpha: float = 0.05) -> float:
    """Nemenyi critical difference of mean ranks, CD = q_alpha sqrt(k(k+1)/(6n)) (Demsar 2006)."""
    if not isinstance(n, (int, np.integer)) or n < 1:
        raise InputError(f"the number of problems n must be a positive integer, got {n!r}",
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


def bootstrap_ci(values, n_boot: int = 2000, level: float = 0.95,
                 seed: int = 0) -> tuple[float, float]:
    """Percentile bootstrap interval of the mean, from a seeded numpy Generator (no global RNG).

    One value has no spread to resample: both bounds equal that value (a degenerate interval, not a
    claim of certainty; report n next to it). Resampling is done in chunks so memory stays bounded.
    """
    data = _finite_vector(values, "values")
    if data.size == 0:
        raise InputError("cannot bootstrap an empty sample", field="values")
    if not 0.0 < level < 1.0:
        raise InputError(f"level must lie in (0, 1), got {level}", field="level")
    if not isinstance(n_boot, (int, np.integer)) or n_boot < 1:
        raise InputError(f"n_boot must be a positive integer, got {n_boot!r}", field="n_boot")
    if data.size == 1:
        return float(data[0]), float(data[0])
    rng = np.random.default_rng(seed)
    chunk = max(1, 2_000_000 // data.size)  # about 16 MB of indices per chunk
    means = np.empty(n_boot)
    for start in range(0, n_boot, chunk):
        stop = min(n_boot, start + chunk)
        means[start:stop] = data[rng.integers(0, data.size, size=(stop - start, data.size))].mean(1)
    tail = (1.0 - level) / 2.0
    low, high = np.quantile(means, [tail, 1.0 - tail])
    return float(low), float(high)


def win_tie_loss(a, b, rel_tol: float = 0.01) -> dict[str, int]:
    """Tally paired errors of method a against method b (smaller error wins).

    A pair is a tie when |a - b| <= rel_tol * max(|a|, |b|) (both 0 is a tie). Pairs with a NaN on
    either side are not judged but counted under "missing", so nothing disappears from the tally.
    Returns {"wins", "ties", "losses", "missing"} from a's point of view.
    """
    first = np.asarray(a, dtype=np.float64).ravel()
    second = np.asarray(b, dtype=np.float64).ravel()
    if first.shape != second.shape:
        raise InputError(f"a has {first.size} values but b has {second.size}", field="b")
    if rel_tol < 0:
        raise InputError(f"rel_tol must be >= 0, got {rel_tol}", field="rel_tol")
    judged = np.isfinite(first) & np.isfinite(second)
    first, second = first[judged], second[judged]
    tie = np.abs(first - second) <= rel_tol * np.maximum(np.abs(first), np.abs(second))
    return {"wins": int(np.sum(~tie & (first < second))), "ties": int(np.sum(tie)),
            "losses": int(np.sum(~tie & (first > second))), "missing": int(np.sum(~judged))}


def relative_change(new, base):
    """(new - base) / |base|: for errors, negative means the new method is better.

    Works on scalars and arrays. A zero base has no relative scale: NaN there.
    """
    new_arr = np.asarray(new, dtype=np.float64)
    base_arr = np.asarray(base, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        change = np.where(base_arr != 0, (new_arr - base_arr) / np.abs(base_arr), np.nan)
    return float(change) if change.ndim == 0 else change
