"""Station table: load and validate config/stations.csv.

Reads the station table (columns station_id, city, lat, lon, elevation_m, site_type; site types from
config/variables.yaml); writes nothing.
Config key obeyed: `data.stations` (the path). Every failure is an InputError naming the file, the row
and the field. ROW is the line number in the file as an editor shows it: the header is line 1, the
first station is line 2.
"""

import io
from pathlib import Path

import pandas as pd

from pipeline.errors import InputError
from pipeline.names import CITY_NAME, SAFE_NAME, check_name
from pipeline.textfile import read_text
from pipeline.variables import registry

REQUIRED_COLUMNS = ("station_id", "city", "lat", "lon", "elevation_m", "site_type")
_HEADER_LINES = 1


def _line(position: int) -> int:
    """Line number in the file of the data row at 0-based `position` (header is line 1)."""
    return position + _HEADER_LINES + 1


def _number(text: str, file: str, line: int, field: str, low: float, high: float) -> float:
    try:
        value = float(text)
    except ValueError:
        raise InputError(f"'{text}' is not a number", file=file, row=line, field=field) from None
    if not (low <= value <= high):  # also rejects nan
        raise InputError(f"{value} is outside [{low}, {high}]", file=file, row=line, field=field)
    return value


def validate_stations(table: pd.DataFrame, file: str) -> pd.DataFrame:
    """Check a station table read as text; return it typed (floats for lat/lon/elevation)."""
    missing = [c for c in REQUIRED_COLUMNS if c not in table.columns]
    if missing:
        raise InputError(f"missing column(s) {', '.join(missing)}", file=file, row=1, field=missing[0])
    if table.empty:
        raise InputError("no stations", file=file)
    seen: dict[str, int] = {}
    site_types = registry().site_types  # config/variables.yaml
    lats, lons, elevations = [], [], []
    lines = table["_line"].tolist() if "_line" in table else [_line(p) for p in range(len(table))]
    table = table.drop(columns="_line", errors="ignore")
    for line, row in zip(lines, table.itertuples(index=False)):
        station_id = check_name(row.station_id, SAFE_NAME, file=file, row=line, field="station_id")
        if station_id in seen:
            raise InputError(f"'{station_id}' already used on line {seen[station_id]}",
                             file=file, row=line, field="station_id")
        seen[station_id] = line
        check_name(row.city, CITY_NAME, file=file, row=line, field="city")
        lats.append(_number(row.lat, file, line, "lat", -90.0, 90.0))
        lons.append(_number(row.lon, file, line, "lon", -180.0, 180.0))
        # Lowest land surface is about -430 m, highest about 8850 m (common knowledge).
        elevations.append(_number(row.elevation_m, file, line, "elevation_m", -500.0, 9000.0))
        site_type = str(row.site_type).strip()
        if site_type not in site_types:
            raise InputError(f"unknown site type '{site_type}' (known: {', '.join(sorted(site_types))}; "
                             f"a new one goes into config/variables.yaml)",
                             file=file, row=line, field="site_type")
    typed = pd.DataFrame({
        "station_id": table["station_id"].str.strip().astype("string"),
        "city": table["city"].str.strip().astype("string"),
        "lat": lats, "lon": lons, "elevation_m": elevations,
        "site_type": table["site_type"].str.strip().astype("string"),
    })
    extra = [c for c in table.columns if c not in REQUIRED_COLUMNS]
    for column in extra:  # kept unchanged: a team may carry notes or agency codes along
        typed[column] = table[column].to_numpy()
    return typed


def load_stations(path) -> pd.DataFrame:
    """Read and validate the station table; InputError (file, row, field) on the first problem."""
    file = str(path)
    if not Path(path).is_file():
        raise InputError("station table not found", file=file)
    text = read_text(path, "utf-8", hint="save the station table as UTF-8")  # a BOM is skipped
    try:
        table = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False, skip_blank_lines=False)
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as error:
        raise InputError(f"not a readable CSV table ({str(error).splitlines()[0]})", file=file) from None
    table.columns = [str(c).strip() for c in table.columns]
    # Blank lines are skipped but still counted, so reported line numbers match the editor's.
    table["_line"] = [_line(p) for p in range(len(table))]
    blank = (table.drop(columns="_line").apply(lambda c: c.str.strip() == "")).all(axis=1)
    return validate_stations(table[~blank].reset_index(drop=True), file)


def stations_of_city(stations: pd.DataFrame, city: str) -> pd.DataFrame:
    return stations[stations["city"] == city].reset_index(drop=True)
