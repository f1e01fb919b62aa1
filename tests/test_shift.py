"""Shift diagnostics against scipy and geographiclib on small invented cities."""

import numpy as np
import pandas as pd
import pytest
from geographiclib.geodesic import Geodesic
from scipy import stats as sps

from pipeline.errors import InputError
from pipeline.shift import (SHIFT_COLUMNS, city_centroids, energy_distance, mean_wasserstein,
                            pairwise_shift, shift_vs_error, standardise)


def test_energy_distance_zero_for_identical_samples_and_grows_with_mean_shift():
    rng = np.random.default_rng(0)
    base = rng.normal(size=(300, 3))
    assert energy_distance(base, base) == pytest.approx(0.0, abs=1e-12)
    other = rng.normal(size=(300, 3))
    distances = [energy_distance(base, other + shift) for shift in (0.0, 0.5, 1.0, 2.0)]
    assert distances == sorted(distances) and distances[-1] > 10 * distances[0]


def test_energy_distance_is_the_square_of_scipy_1d_energy_distance():
    # scipy.stats.energy_distance returns sqrt(2E|X-Y| - E|X-X'| - E|Y-Y'|) computed from the
    # empirical CDFs (sqrt(2) times the L2 distance between them); on empirical samples that square
    # equals our V-statistic, which averages over all pairs including i = j.
    rng = np.random.default_rng(1)
    u, v = rng.normal(size=150), rng.normal(0.7, 1.3, size=90)
    assert energy_distance(u, v) == pytest.approx(sps.energy_distance(u, v) ** 2, rel=1e-9)


def test_energy_distance_subsampling_is_seeded_and_close_to_full_sample():
    rng = np.random.default_rng(2)
    a, b = rng.normal(size=(1500, 2)), rng.normal(0.5, 1.0, size=(1500, 2))
    full = energy_distance(a, b, max_n=2000)
    assert energy_distance(a, b, max_n=400, seed=4) == energy_distance(a, b, max_n=400, seed=4)
    assert energy_distance(a, b, max_n=400, seed=4) != energy_distance(a, b, max_n=400, seed=5)
    assert energy_distance(a, b, max_n=400, seed=4) == pytest.approx(full, rel=0.35)
    with pytest.raises(InputError):
        energy_distance(np.array([[1.0, np.nan]]), b)


def test_mean_wasserstein_averages_scipy_per_variable():
    rng = np.random.default_rng(3)
    a = rng.normal(size=(200, 2))
    b = np.column_stack([a[:, 0] + 1.5, rng.exponential(size=200)])
    b[:10, 1] = np.nan  # NaN values are left out per variable, not per row
    # scipy.stats.wasserstein_distance per column
    expected = np.mean([sps.wasserstein_distance(a[:, 0], b[:, 0]),
                        sps.wasserstein_distance(a[:, 1], b[10:, 1])])
    assert mean_wasserstein(a, b) == pytest.approx(expected)
    # a pure shift by c moves the distribution by exactly c (Wasserstein-1 property)
    assert sps.wasserstein_distance(a[:, 0], b[:, 0]) == pytest.approx(1.5)
    with pytest.raises(InputError):
        mean_wasserstein(a, np.full((5, 2), np.nan))


def test_standardise_fits_on_pooled_rows():
    first = pd.DataFrame({"x": [1.0, 2.0, 3.0], "flat": [5.0, 5.0, 5.0], "label": ["a", "b", "c"]})
    second = pd.DataFrame({"x": [11.0, np.nan, 13.0], "flat": [5.0, 5.0, np.nan],
                           "label": ["d", "e", "f"]})
    scaled = standardise({"one": first, "two": second})
    assert list(scaled) == ["one", "two"] and list(scaled["one"].columns) == ["x", "flat"]
    pooled = pd.concat([scaled["one"], scaled["two"]])
    assert pooled["x"].mean() == pytest.approx(0.0)
    assert pooled["x"].std(ddof=0) == pytest.approx(1.0)
    assert np.isnan(scaled["two"]["x"].iloc[1])
    np.testing.assert_allclose(pooled["flat"].dropna(), 0.0)  # constant: centred, not divided by 0
    assert isinstance(standardise([first, second], ["x"]), list)
    with pytest.raises(InputError):
        standardise([first, second], ["missing"])


def _invented_cities():
    """Three invented cities; 'korvale' has a shifted pm25 level, 'lunmar' has no so2 monitor."""
    rng = np.random.default_rng(4)
    stations = pd.DataFrame({
        "station_id": ["ardent_1", "ardent_2", "korvale_1", "korvale_2", "lunmar_1"],
        "city": ["ardent", "ardent", "korvale", "korvale", "lunmar"],
        "lat": [10.0, 10.2, 10.1, 10.3, 60.0],
        "lon": [20.0, 20.2, 24.0, 24.2, 5.0],
    })
    size = 400

    def table(pm25_mean, so2):
        return pd.DataFrame({"pm25": rng.normal(pm25_mean, 5.0, size),
                             "temp_c": rng.normal(15.0, 4.0, size),
                             "so2": rng.normal(8.0, 2.0, size) if so2 else np.full(size, np.nan)})

    tables = {"ardent": table(20.0, True), "korvale": table(45.0, True),
              "lunmar": table(21.0, False)}
    tables["ardent"].loc[:9, "temp_c"] = np.nan  # incomplete rows are counted, not used for energy
    return tables, stations


def test_pairwise_shift_table():
    tables, stations = _invented_cities()
    shift = pairwise_shift(tables, ["pm25", "temp_c", "so2"], stations, max_n=300)
    assert list(shift.columns) == list(SHIFT_COLUMNS)
    assert list(zip(shift.city_a, shift.city_b)) == [("ardent", "korvale"), ("ardent", "lunmar"),
                                                     ("korvale", "lunmar")]
    by_pair = shift.set_index(["city_a", "city_b"])
    assert by_pair.loc[("ardent", "korvale"), "energy_distance"] > 5 * by_pair.loc[
        ("ardent", "lunmar"), "energy_distance"]
    assert by_pair.loc[("ardent", "korvale"), "variables"] == "pm25,temp_c,so2"
    assert by_pair.loc[("ardent", "lunmar"), "variables"] == "pm25,temp_c"
    assert by_pair.loc[("ardent", "korvale"), "n_rows_a"] == 390
    with pytest.raises(InputError):
        pairwise_shift(tables, ["pm25", "no2"], stations)
    with pytest.raises(InputError):
        pairwise_shift(tables, ["pm25"], stations[stations.city != "lunmar"])


def test_pairwise_geo_km_agrees_with_geodesic_between_centroids():
    tables, stations = _invented_cities()
    shift = pairwise_shift(tables, ["pm25"], stations).set_index(["city_a", "city_b"])
    centroids = city_centroids(stations)
    assert centroids.loc["ardent", "lat"] == pytest.approx(10.1, abs=1e-3)
    for city_a, city_b in shift.index:
        # WGS84 geodesic, geographiclib (Karney 2013); sphere vs ellipsoid: rel 6e-3
        lat_a, lon_a = centroids.loc[city_a, ["lat", "lon"]]
        lat_b, lon_b = centroids.loc[city_b, ["lat", "lon"]]
        geodesic_km = Geodesic.WGS84.Inverse(lat_a, lon_a, lat_b, lon_b)["s12"] / 1000.0
        assert shift.at[(city_a, city_b), "geo_km"] == pytest.approx(geodesic_km, rel=6e-3)


def test_centroid_averages_across_the_antimeridian():
    stations = pd.DataFrame({"city": ["zeel", "zeel"], "lat": [0.0, 0.0], "lon": [179.0, -179.0]})
    assert abs(city_centroids(stations).loc["zeel", "lon"]) == pytest.approx(180.0)


def test_shift_vs_error_relates_mean_source_shift_to_target_error():
    shift = pd.DataFrame({"city_a": ["a", "a", "a", "b", "b", "c"],
                          "city_b": ["b", "c", "d", "c", "d", "d"],
                          "energy_distance": [0.1, 0.2, 0.3, 0.4, 0.5, 0.6]})
    errors = pd.DataFrame({"sources": ["a+b", ["a", "c"], "b+c", "c"],
                           "target": ["d", "b", "a", "b"],
                           "mase": [1.0, 0.5, 0.4, 0.9]})
    # mean shifts per row: (0.3+0.5)/2=0.4, (0.1+0.4)/2=0.25, (0.1+0.2)/2=0.15, 0.4
    rho, p_value = shift_vs_error(shift, errors)
    reference = sps.spearmanr([0.4, 0.25, 0.15, 0.4], [1.0, 0.5, 0.4, 0.9])  # scipy.stats.spearmanr
    assert rho == pytest.approx(reference.statistic) and p_value == pytest.approx(reference.pvalue)
    assert rho > 0.9
    assert all(np.isnan(shift_vs_error(shift, errors.iloc[:2])))
    with pytest.raises(InputError, match="errors_df:1: sources"):
        shift_vs_error(shift, errors.assign(target=["d", "e", "a", "b"]))
    with pytest.raises(InputError):
        shift_vs_error(shift, errors.assign(mase=[1.0, np.nan, 0.4, 0.9]))
