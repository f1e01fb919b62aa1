"""Station table: the committed demo table is valid and geographically sane; bad tables fail clearly."""

import itertools
from pathlib import Path

import pytest
from geographiclib.geodesic import Geodesic

from pipeline.errors import InputError
from pipeline.stations import load_stations

ROOT = Path(__file__).resolve().parents[1]
HEADER = "station_id,city,lat,lon,elevation_m,site_type\n"
GOOD = "a_1,alpha,48.1,10.2,400,urban_traffic\n"


def distance_km(a, b):
    # Reference geodesic on WGS84: geographiclib (Karney 2013).
    return Geodesic.WGS84.Inverse(a.lat, a.lon, b.lat, b.lon)["s12"] / 1000.0


def test_demo_station_table_has_5_plus_cities_of_3_to_8_stations():
    stations = load_stations(ROOT / "config" / "stations.csv")
    sizes = stations.groupby("city").size()
    assert len(sizes) >= 5 and sizes.between(3, 8).all()
    assert stations["city"].str.fullmatch(r"[a-z][a-z0-9]*").all()


def test_demo_geography_stations_within_15_km_cities_40_to_400_km_apart():
    stations = load_stations(ROOT / "config" / "stations.csv")
    for _, group in stations.groupby("city"):
        for a, b in itertools.combinations(group.itertuples(), 2):
            assert distance_km(a, b) <= 15.0, (a.station_id, b.station_id)
    centres = stations.groupby("city")[["lat", "lon"]].mean().reset_index()
    for a, b in itertools.combinations(centres.itertuples(), 2):
        assert 40.0 <= distance_km(a, b) <= 400.0, (a.city, b.city)


def write(tmp_path, body, header=HEADER):
    path = tmp_path / "stations.csv"
    path.write_text(header + body)
    return path


@pytest.mark.parametrize("body, line, field", [
    (GOOD + "a_1,alpha,48.2,10.2,400,suburban\n", 3, "station_id"),     # duplicate id
    (GOOD + "A-2,alpha,48.2,10.2,400,suburban\n", 3, "station_id"),     # unsafe in a file name
    (GOOD + "a_2,Alpha City,48.2,10.2,400,suburban\n", 3, "city"),
    (GOOD + "a_2,alpha,95,10.2,400,suburban\n", 3, "lat"),
    (GOOD + "a_2,alpha,48.2,-181,400,suburban\n", 3, "lon"),
    (GOOD + "a_2,alpha,48.2,10.2,high,suburban\n", 3, "elevation_m"),
    (GOOD + "a_2,alpha,48.2,10.2,400,harbour\n", 3, "site_type"),
    ("a_1,alpha,north,10.2,400,urban_traffic\n", 2, "lat"),
    (GOOD + "\n" + "a_3,alpha,48.2,10.2,400,spaceport\n", 4, "site_type"),  # blank line skipped, counted
])
def test_each_failure_names_file_line_and_field_in_one_line(tmp_path, body, line, field):
    path = write(tmp_path, body)
    with pytest.raises(InputError) as caught:
        load_stations(path)
    message = str(caught.value)
    assert message.startswith(f"{path}:{line}: {field}: ") and "\n" not in message
    assert (caught.value.row, caught.value.field) == (line, field)


def test_missing_column_and_missing_file(tmp_path):
    path = write(tmp_path, "a_1,alpha,48.1,10.2,urban_traffic\n",
                 header="station_id,city,lat,lon,site_type\n")
    with pytest.raises(InputError, match="elevation_m"):
        load_stations(path)
    with pytest.raises(InputError, match="not found"):
        load_stations(tmp_path / "nope.csv")


def test_types_after_loading(tmp_path):
    stations = load_stations(write(tmp_path, GOOD))
    assert stations.loc[0, "lat"] == 48.1 and stations["elevation_m"].dtype == float
