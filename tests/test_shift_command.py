"""Shift diagnostics from clean tables, as the `diagnose_shift` rule and `shiftgrid shift` compute them."""


import numpy as np

from synthetic_clean import clean_table, station_table

from pipeline.commands.shift import format_table
from pipeline.geo import haversine_km
from pipeline.report.shift_data import compute_shift


def test_shift_of_three_cities_orders_a_shifted_city_last(tmp_path):
    stations = station_table({"aa": [("aa_1", 48.0, 10.0)], "bb": [("bb_1", 48.0, 11.0)],
                              "cc": [("cc_1", 49.0, 10.0)]})
    stations_path = tmp_path / "stations.csv"
    stations.assign(site_type="urban_background").to_csv(stations_path, index=False)
    paths = {}
    for seed, city in enumerate(["aa", "bb", "cc"]):
        table = clean_table([f"{city}_1"], 24 * 20, seed=seed)
        if city == "cc":  # a city whose weather runs 8 degrees warmer: a real distribution shift
            table["temp_c"] += 8.0
        paths[city] = tmp_path / f"{city}.parquet"
        table.to_parquet(paths[city])
    shift = compute_shift(paths, stations_path)
    assert len(shift) == 3
    pair = {tuple(sorted((r.city_a, r.city_b))): r for r in shift.itertuples()}
    assert pair[("aa", "bb")].energy_distance < pair[("aa", "cc")].energy_distance
    assert pair[("aa", "bb")].energy_distance < pair[("bb", "cc")].energy_distance
    # geographic distance between one-station cities is the haversine distance (R = 6371.0088 km)
    assert np.isclose(pair[("aa", "bb")].geo_km, haversine_km(48.0, 10.0, 48.0, 11.0), rtol=1e-6)
    table = format_table(shift, None)
    assert "no grid yet" in table and all(len(line) <= 100 for line in table.splitlines())
