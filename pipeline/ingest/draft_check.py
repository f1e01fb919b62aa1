"""Try a format dict on a city's raw dump without writing anything: the QC summary, in seconds.

Reads the dump files the format names (relative to raw_dir) and the station table; writes nothing (no
clean table, no QC file). Runs the real ingestion (pipeline.ingest.core.ingest_city), so the counts are
the ones a real run would report. A city not yet in the station table is tried with every delivered
code (after `station_map`) taken as a station, so the format can be settled before the station table;
the summary says so.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from pipeline.errors import InputError
from pipeline.ingest.core import READERS, matching_files, ingest_city
from pipeline.ingest.formats import validate_format
from pipeline.stations import load_stations, stations_of_city


def _stations_from_codes(city: str, spec: dict, raw_dir) -> pd.DataFrame:
    raw = READERS[spec["layout"]].read(matching_files(raw_dir, spec["files"]), spec)
    codes = sorted({spec["station_map"].get(code, code) for code in raw.frame["station_raw"].unique() if code})
    return pd.DataFrame({"station_id": codes, "city": city})


def check_format(city: str, fmt: dict, raw_dir, stations_csv, reference_temperature_c: float = 25.0,
                 config_file: str | None = None) -> dict:
    """The QC report a real ingestion of `city` with `fmt` would write, plus `stations_assumed`."""
    stations = load_stations(stations_csv) if stations_csv and Path(stations_csv).is_file() else None
    assumed = stations is None or stations_of_city(stations, city).empty
    if assumed:
        spec = validate_format(city, fmt, reference_temperature_c, config_file)
        stations = _stations_from_codes(city, spec, raw_dir)
    _, report = ingest_city(city, fmt, raw_dir, stations, reference_temperature_c, config_file=config_file)
    report["stations_assumed"] = assumed
    return report


def summary_lines(report: dict) -> list[str]:
    """The QC summary for people: rows read / kept / dropped by reason, flagged values, what to fix."""
    rows = report["rows"]
    lines = [f"city {report['city']} ({report['layout']}, {len(report['files'])} file(s)): rows read {rows['read']}, "
             f"kept {rows['kept']}, dropped {rows['dropped']}"]
    if report.get("stations_assumed"):
        lines.append("  no station of this city in the station table: every delivered code counted as a station")
    for reason, count in rows["dropped_by_reason"].items():
        if count:
            lines.append(f"  dropped {reason}: {count}")
    for key, label in (("unknown_station_codes", "unknown station codes"),
                       ("unmapped_variable_codes", "variable codes not mapped")):
        if report.get(key):
            lines.append(f"  {label}: " + ", ".join(f"{code} ({n})" for code, n in report[key].items()))
    dst = report["dst"]
    lines.append(f"  clock: {dst['timezone']}; ambiguous rows {dst.get('ambiguous_rows', 0)}, nonexistent rows "
                 f"dropped {dst.get('nonexistent_rows_dropped', 0)}; hour label {dst['hour_label']}")
    for variable, counts in report["values"].items():
        flagged = {flag: n for flag, n in counts.items() if flag not in ("ok", "missing") and n}
        if variable in report["variables_delivered"]:
            shown = ", ".join(f"{flag} {n}" for flag, n in flagged.items()) or "none flagged"
            lines.append(f"  {variable}: ok {counts['ok']}, missing {counts['missing']}, {shown}")
    if report.get("constant_series"):
        lines.append(f"  never-changing series: {sorted(report['constant_series'])}")
    return lines


def load_block(path: Path, city: str | None) -> tuple[str, dict, dict]:
    """(city, format dict, data-config keys around it) from a drafted block or a data config file."""
    import yaml

    try:
        data = yaml.safe_load(Path(path).read_text(encoding="utf-8"))
    except OSError as error:
        raise InputError(f"cannot read ({error.strerror})", file=str(path)) from None
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        raise InputError(str(getattr(error, "problem", None) or error).splitlines()[0], file=str(path),
                         row=mark.line + 1 if mark else None, field="yaml") from None
    if not isinstance(data, dict):
        raise InputError("expected a mapping with `cities` or a format's keys", file=str(path))
    if "layout" in data:  # a bare format dict
        return city or Path(path).stem, data, {}
    cities = data.get("cities")
    if not isinstance(cities, dict) or not cities:
        raise InputError("no `cities` mapping", file=str(path), field="cities")
    if city is None:
        if len(cities) > 1:
            raise InputError(f"several cities ({', '.join(cities)}): name one with --city", file=str(path),
                             field="cities")
        city = next(iter(cities))
    if city not in cities:
        raise InputError(f"no city {city!r} (found: {', '.join(cities)})", file=str(path), field="cities")
    return city, cities[city], {k: v for k, v in data.items() if k != "cities"}
