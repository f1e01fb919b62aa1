"""Haversine distances against published values and geographiclib; single-linkage station clusters."""

import numpy as np
import pytest
from geographiclib.geodesic import Geodesic

from pipeline.errors import InputError
from pipeline.geo import cluster_stations, haversine_km
from synthetic_clean import station_table


def test_haversine_matches_worked_values():
    # Haversine with the IUGG mean Earth radius R = 6371.0088 km; values computed for the project
    assert haversine_km(0.0, 0.0, 0.0, 1.0) == pytest.approx(111.1951, abs=1e-4)
    assert haversine_km(60.0, 5.0, 60.0, 25.0) == pytest.approx(1107.7088, abs=1e-4)
    # one degree of a great circle is 2 pi R / 360 (geometry of the sphere)
    assert haversine_km(10.0, 20.0, 11.0, 20.0) == pytest.approx(2 * np.pi * 6371.0088 / 360, rel=1e-12)


def test_haversine_close_to_wgs84_geodesic():
    # Reference: geographiclib, Karney (2013) "Algorithms for geodesics", WGS84 ellipsoid. The sphere
    # differs from the ellipsoid by up to ~0.5 %: compare at rel 6e-3.
    rng = np.random.default_rng(7)
    lat1, lat2 = rng.uniform(-70, 70, 40), rng.uniform(-70, 70, 40)
    lon1, lon2 = rng.uniform(-180, 180, 40), rng.uniform(-180, 180, 40)
    # city-scale pairs too: a few km apart
    lat2[:10], lon2[:10] = lat1[:10] + 0.03, lon1[:10] - 0.04
    ours = haversine_km(lat1, lon1, lat2, lon2)
    for i in range(40):
        reference = Geodesic.WGS84.Inverse(lat1[i], lon1[i], lat2[i], lon2[i])["s12"] / 1000.0
        assert ours[i] == pytest.approx(reference, rel=6e-3)


def test_haversine_is_vectorised_symmetric_and_zero_on_the_diagonal():
    lat = np.array([0.0, 45.0, -30.0])
    lon = np.array([0.0, 7.0, 120.0])
    matrix = haversine_km(lat[:, None], lon[:, None], lat[None, :], lon[None, :])
    assert matrix.shape == (3, 3)
    assert np.allclose(matrix, matrix.T)
    assert np.all(np.diag(matrix) == 0.0)
    assert matrix[1, 2] == pytest.approx(haversine_km(45.0, 7.0, -30.0, 120.0))
    assert isinstance(haversine_km(1.0, 2.0, 3.0, 4.0), float)


LAYOUT = {
    # avel: a chain b - c - d, each link ~5.6 km (0.05 deg of longitude at the equator), b-d ~11.1 km;
    # a sits 111 km away. Single linkage joins the whole chain at 10 km although b-d > 10 km.
    "avel": [("avel_a", 1.0, 0.0), ("avel_b", 0.0, 0.0), ("avel_c", 0.0, 0.05), ("avel_d", 0.0, 0.10)],
    # brum: one station at the same place as avel_b, but clusters never cross cities
    "brum": [("brum_x", 0.0, 0.0)],
}


def test_single_linkage_clusters_on_a_hand_made_layout():
    clusters = cluster_stations(station_table(LAYOUT), threshold_km=10.0)
    assert clusters == {"avel_a": "avel-c1", "avel_b": "avel-c2", "avel_c": "avel-c2", "avel_d": "avel-c2",
                        "brum_x": "brum-c1"}
    # below the link length (5.56 km) every station is its own cluster, named in id order
    alone = cluster_stations(station_table(LAYOUT), threshold_km=5.0)
    assert [alone[s] for s in ("avel_a", "avel_b", "avel_c", "avel_d")] == ["avel-c1", "avel-c2", "avel-c3",
                                                                          "avel-c4"]


def test_cluster_names_do_not_depend_on_row_order():
    table = station_table(LAYOUT)
    shuffled = table.sample(frac=1.0, random_state=3)
    assert cluster_stations(shuffled, 10.0) == cluster_stations(table, 10.0)


def test_cluster_threshold_must_be_positive():
    with pytest.raises(InputError, match="split.cluster_km"):
        cluster_stations(station_table(LAYOUT), 0.0)
