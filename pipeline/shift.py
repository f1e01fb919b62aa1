"""Shift diagnostics between cities: how far apart their data are, and whether that predicts error.

Reads: clean tables (one DataFrame per city, columns named as in pipeline.variables) and the station
table (station_id, city, lat, lon), both handed over by the caller; an errors table of finished runs
for `shift_vs_error`. Writes nothing. Config keys: none directly; the caller passes the variables to
compare (the `shift` CLI command and the report use the forecast features).

Distances are computed on standardised values (one mean/std per variable fitted on the pooled rows
of all compared cities), so a variable in hPa does not outweigh one in m/s and all city pairs are
measured on one common scale and can be ranked against each other.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from itertools import combinations

import numpy as np
import pandas as pd
from scipy import stats as sps
from scipy.spatial.distance import cdist

from pipeline.errors import InputError

SHIFT_COLUMNS = ("city_a", "city_b", "energy_distance", "mean_wasserstein", "geo_km",
                 "n_rows_a", "n_rows_b", "variables")


def standardise(frames, columns: Sequence[str] | None = None):
    """Z-score `columns` of several DataFrames with one mean/std fitted on their pooled rows.

    `frames` is a dict {name: DataFrame} or a list of DataFrames; the same container type comes
    back, holding new DataFrames with only `columns` (default: the numeric columns common to all
    frames). NaN is ignored in the fit and kept in the output. A column that is constant (or all
    NaN) in the pool is only centred (std taken as 1), because dividing by 0 would give NaN.
    """
    named = dict(frames) if isinstance(frames, Mapping) else dict(enumerate(frames))
    if not named:
        raise InputError("no tables to standardise", field="frames")
    if columns is None:
        common = [set(frame.select_dtypes("number").columns) for frame in named.values()]
        first = next(iter(named.values()))
        columns = [col for col in first.columns if all(col in cols for cols in common)]
    columns = list(columns)
    for name, frame in named.items():
        missing = [col for col in columns if col not in frame.columns]
        if missing:
            raise InputError(f"table {name!r} lacks columns {missing}", field="frames")
    pooled = np.concatenate([frame[columns].to_numpy(np.float64) for frame in named.values()])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns: handled just below
        mean = np.nanmean(pooled, axis=0)
        std = np.nanstd(pooled, axis=0)
    mean = np.where(np.isfinite(mean), mean, 0.0)
    std = np.where(np.isfinite(std) & (std > 0), std, 1.0)
    scaled = {name: pd.DataFrame((frame[columns].to_numpy(np.float64) - mean) / std,
                                 columns=columns, index=frame.index)
              for name, frame in named.items()}
    return scaled if isinstance(frames, Mapping) else list(scaled.values())


def _as_samples(values, name: str) -> np.ndarray:
    arr = np.asarray(values, dtype=np.float64)
    arr = arr.reshape(-1, 1) if arr.ndim == 1 else arr
    if arr.ndim != 2 or arr.shape[0] == 0:
        raise InputError(f"expected a non-empty (n, p) sample, got shape {arr.shape}", field=name)
    return arr


def energy_distance(a, b, max_n: int = 2000, seed: int = 0) -> float:
    """Energy distance E = 2 E|X-Y| - E|X-X'| - E|Y-Y'| between two multivariate samples.

    a (n, p) and b (m, p) (1-D means p = 1), Euclidean norm. The expectations are plain means over
    all pairs including i = j (the V-statistic), which keeps E >= 0. It is the square of what
    scipy.stats.energy_distance returns for 1-D samples. Each sample larger than `max_n` rows is
    subsampled without replacement by a Generator seeded with `seed` (cost is quadratic in n).
    Rows with NaN are rejected: the caller drops incomplete rows and reports how many it kept.
    """
    a, b = _as_samples(a, "a"), _as_samples(b, "b")
    if a.shape[1] != b.shape[1]:
        raise InputError(f"samples have {a.shape[1]} and {b.shape[1]} variables", field="b")
    if not isinstance(max_n, (int, np.integer)) or max_n < 2:
        raise InputError(f"max_n must be an integer >= 2, got {max_n!r}", field="max_n")
    if not (np.isfinite(a).all() and np.isfinite(b).all()):
        raise InputError("samples hold NaN/inf; drop incomplete rows first", field="a, b")
    rng = np.random.default_rng(seed)
    if a.shape[0] > max_n:
        a = a[rng.choice(a.shape[0], size=max_n, replace=False)]
    if b.shape[0] > max_n:
        b = b[rng.choice(b.shape[0], size=max_n, replace=False)]
    between = cdist(a, b).mean()
    within_a = cdist(a, a).mean()
    within_b = cdist(b, b).mean()
    # rounding can leave a tiny negative value for identical samples
    return float(max(0.0, 2.0 * between - within_a - within_b))


def mean_wasserstein(a, b) -> float:
    """Mean over variables of the 1-D Wasserstein-1 distance between a[:, j] and b[:, j].

    Each variable uses all its finite values on both sides (rows need not be complete). A variable
    with no finite value on one side cannot be compared: InputError naming its column index.
    """
    a, b = _as_samples(a, "a"), _as_samples(b, "b")
    if a.shape[1] != b.shape[1]:
        raise InputError(f"samples have {a.shape[1]} and {b.shape[1]} variables", field="b")
    distances = []
    for col in range(a.shape[1]):
        left, right = a[:, col], b[:, col]
        left, right = left[np.isfinite(left)], right[np.isfinite(right)]
        if left.size == 0 or right.size == 0:
            raise InputError("no finite value on one side", field=f"variable column {col}")
        distances.append(sps.wasserstein_distance(left, right))
    return float(np.mean(distances))


def city_centroids(stations: pd.DataFrame) -> pd.DataFrame:
    """Centroid (lat, lon) of each city's stations, averaged as 3-D unit vectors.

    Averaging vectors instead of degrees stays right across the antimeridian. Returns a DataFrame
    indexed by city with columns lat, lon.
    """
    missing = {"city", "lat", "lon"} - set(stations.columns)
    if missing:
        raise InputError(f"station table lacks columns {sorted(missing)}", field="stations")
    lat = np.radians(stations["lat"].to_numpy(np.float64))
    lon = np.radians(stations["lon"].to_numpy(np.float64))
    vectors = pd.DataFrame({"x": np.cos(lat) * np.cos(lon), "y": np.cos(lat) * np.sin(lon),
                            "z": np.sin(lat), "city": stations["city"].astype(str).to_numpy()})
    mean = vectors.groupby("city")[["x", "y", "z"]].mean()
    return pd.DataFrame({"lat": np.degrees(np.arctan2(mean["z"], np.hypot(mean["x"], mean["y"]))),
                         "lon": np.degrees(np.arctan2(mean["y"], mean["x"]))}, index=mean.index)


def pairwise_shift(tables: Mapping[str, pd.DataFrame], variables: Sequence[str],
                   stations: pd.DataFrame, *, max_n: int = 2000, seed: int = 0) -> pd.DataFrame:
    """Shift between every unordered pair of cities (city_a < city_b alphabetically).

    Columns: city_a, city_b, energy_distance (complete rows, subsampled to `max_n`),
    mean_wasserstein, geo_km (great-circle distance between the city centroids of `stations`),
    n_rows_a / n_rows_b (complete rows available for the energy distance, before subsampling) and
    variables (the comma-joined variables used: those with at least one value in both cities, so a
    city without, say, an SO2 monitor still gets compared on the rest). No usable variable: NaN
    distances. All cities are standardised together first (see the module docstring).
    """
    from pipeline.geo import haversine_km  # one haversine in the package; imported where needed

    variables = list(variables)
    for city, table in tables.items():
        missing = [var for var in variables if var not in table.columns]
        if missing:
            raise InputError(f"clean table of city {city!r} lacks variables {missing}",
                             field="variables")
    centroids = city_centroids(stations)
    unknown = sorted(set(tables) - set(centroids.index))
    if unknown:
        raise InputError(f"cities {unknown} have no station in the station table", field="city")
    scaled = standardise(tables, variables)
    rows = []
    for city_a, city_b in combinations(sorted(tables), 2):
        frame_a, frame_b = scaled[city_a], scaled[city_b]
        used = [var for var in variables
                if frame_a[var].notna().any() and frame_b[var].notna().any()]
        complete_a = frame_a[used].dropna().to_numpy() if used else np.empty((0, 0))
        complete_b = frame_b[used].dropna().to_numpy() if used else np.empty((0, 0))
        energy = (energy_distance(complete_a, complete_b, max_n=max_n, seed=seed)
                  if len(complete_a) and len(complete_b) else float("nan"))
        wasserstein = mean_wasserstein(frame_a[used], frame_b[used]) if used else float("nan")
        geo_km = haversine_km(centroids.at[city_a, "lat"], centroids.at[city_a, "lon"],
                              centroids.at[city_b, "lat"], centroids.at[city_b, "lon"])
        rows.append((city_a, city_b, energy, wasserstein, float(geo_km),
                     len(complete_a), len(complete_b), ",".join(used)))
    return pd.DataFrame(rows, columns=list(SHIFT_COLUMNS))


def _pair_lookup(shift_df: pd.DataFrame, shift_col: str) -> dict[frozenset, float]:
    missing = {"city_a", "city_b", shift_col} - set(shift_df.columns)
    if missing:
        raise InputError(f"shift table lacks columns {sorted(missing)}", field="shift_df")
    return {frozenset((a, b)): float(value)
            for a, b, value in zip(shift_df["city_a"], shift_df["city_b"], shift_df[shift_col])}


def shift_vs_error(shift_df: pd.DataFrame, errors_df: pd.DataFrame, *,
                   shift_col: str = "energy_distance", error_col: str = "mase",
                   sources_col: str = "sources", target_col: str = "target") -> tuple[float, float]:
    """Spearman correlation (rho, p) between source-to-target shift and the error on the target.

    Each row of `errors_df` is one run or split: its target city, its source cities (a list or a
    "+"-joined string) and an error. Its shift is the mean shift between the target and each source.
    Rows with a NaN error or a missing city pair are rejected, naming the row's index label (filter
    and count them first). Fewer than 3 rows, or a constant column, leave the correlation undefined:
    (NaN, NaN).
    """
    missing = {sources_col, target_col, error_col} - set(errors_df.columns)
    if missing:
        raise InputError(f"errors table lacks columns {sorted(missing)}", field="errors_df")
    lookup = _pair_lookup(shift_df, shift_col)
    shifts, errors = [], []
    for label, sources, target, error in zip(errors_df.index, errors_df[sources_col],
                                             errors_df[target_col], errors_df[error_col]):
        source_list = sources.split("+") if isinstance(sources, str) else list(sources)
        pairs = [frozenset((source, target)) for source in source_list if source != target]
        absent = [sorted(pair) for pair in pairs if pair not in lookup]
        if not pairs or absent:
            raise InputError(f"no shift value for city pairs {absent or 'source == target'}",
                             row=label, file="errors_df", field=sources_col)
        if not np.isfinite(error):
            raise InputError("error is NaN; drop failed runs first", row=label,
                             file="errors_df", field=error_col)
        shift = float(np.mean([lookup[pair] for pair in pairs]))
        if not np.isfinite(shift):
            raise InputError(f"shift {shift_col} is NaN for this split's city pairs", row=label,
                             file="errors_df", field=sources_col)
        shifts.append(shift)
        errors.append(float(error))
    if len(errors) < 3 or np.ptp(shifts) == 0 or np.ptp(errors) == 0:
        return float("nan"), float("nan")
    result = sps.spearmanr(shifts, errors)
    return float(result.statistic), float(result.pvalue)
