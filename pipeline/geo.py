"""Distances between stations and distance-based station clusters.

Reads: a station table (columns station_id, city, lat, lon) passed in by the caller; writes nothing.
Config keys obeyed (through pipeline.splits): `split.cluster_km` (the clustering threshold).

Distances use the haversine formula on a sphere of radius 6371.0088 km (the IUGG mean Earth radius).
Within a city the difference to the WGS84 ellipsoidal geodesic is a few per mille, far below any
sensible clustering threshold, so the sphere is good enough and needs no extra dependency.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.errors import InputError

EARTH_RADIUS_KM = 6371.0088  # IUGG mean radius R1 = (2a + b) / 3 of WGS84


def haversine_km(lat1, lon1, lat2, lon2):
    """Great-circle distance in km between points given in degrees; numpy-broadcast over the inputs.

    Returns a float for scalar inputs and an ndarray otherwise.
    """
    phi1, phi2 = np.radians(lat1), np.radians(lat2)
    half_dphi = (phi2 - phi1) / 2.0
    half_dlambda = np.radians(np.subtract(lon2, lon1)) / 2.0
    a = np.sin(half_dphi) ** 2 + np.cos(phi1) * np.cos(phi2) * np.sin(half_dlambda) ** 2
    # clip guards against a > 1 from rounding for antipodal points
    distance = 2.0 * EARTH_RADIUS_KM * np.arcsin(np.sqrt(np.clip(a, 0.0, 1.0)))
    return float(distance) if np.ndim(distance) == 0 else distance


def cluster_stations(stations: pd.DataFrame, threshold_km: float, label: str = "c") -> dict[str, str]:
    """Group stations by single linkage: two stations closer than `threshold_km` share a cluster.

    Clusters never cross cities (a city is a domain of its own). Names are `<city>-<label><k>`, with
    k = 1, 2, ... ordered by the smallest station id of each cluster, so they do not depend on the row
    order of the table. Returns {station_id: cluster name}.
    """
    if not threshold_km > 0:
        raise InputError(f"must be > 0, got {threshold_km!r}", field="split.cluster_km")
    missing = {"station_id", "city", "lat", "lon"} - set(stations.columns)
    if missing:
        raise InputError(f"station table lacks columns {sorted(missing)}", field="stations")
    names: dict[str, str] = {}
    for city, group in stations.groupby("city", sort=True):
        group = group.sort_values("station_id")
        ids = group["station_id"].astype(str).to_list()
        lat, lon = group["lat"].to_numpy(float), group["lon"].to_numpy(float)
        close = haversine_km(lat[:, None], lon[:, None], lat[None, :], lon[None, :]) < threshold_km
        component = _connected_components(close)
        # ids are sorted, so the first member seen of each component is its smallest station id
        order: dict[int, int] = {}
        for comp in component:
            order.setdefault(int(comp), len(order) + 1)
        for station_id, comp in zip(ids, component):
            names[station_id] = f"{city}-{label}{order[int(comp)]}"
    return names


def _connected_components(adjacent: np.ndarray) -> np.ndarray:
    """Component label per node of a symmetric boolean adjacency matrix (scipy's graph routine)."""
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import connected_components

    return connected_components(csr_matrix(adjacent), directed=False)[1]
