"""Invented demo scenario: simulate six invented cities and write their raw dumps as agencies would.

Reads the station table (a DataFrame) and the cities' format dicts (config `data.cities`); writes
raw dump files under `raw_dir` (config `data.raw_dir`), one set per city in that city's own format.
Config keys obeyed: `data.generator.start`, `data.generator.days`, `data.generator.seed`,
`data.cities.<city>` (layout, files, columns/variables, units, time, sentinels, separator, decimal,
header_line, station_map), `data.reference_temperature_c`.

Ground truth (also in docs/demo-scenario.md; constants live in simulate.py under the same names)
------------------------------------------------------------------------------------------------
Shared mechanism, identical in every city (the invariant relations):
- Weather: temperature = 9.5 C + city offset + 9.5 C seasonal cycle (coldest mid-January) + diurnal
  cycle 4.5 C (peak 15 h solar time, damped by cloud) + 2.0 * anomaly; anomalies are AR(1) series,
  0.8 * regional + 0.6 * city-local (hourly phi: temperature 0.97, pressure 0.995, wind 0.95,
  wetness 0.9). Rain when wetness > 1.2 (gamma amounts). RH from a dew-point depression (Magnus
  formula) that shrinks at night and in rain. Wind speed 3.2 m/s * exp(anomaly) * (1 + 0.35 * sun).
  Station pressure = 1013.25 hPa * exp(-elevation / 8434 m) + synoptic anomaly.
- Mixing height (latent, not delivered): BLH = 120 m + 1400 m * sun * (0.55 + 0.45 * summer)
  + 90 m per m/s of wind: shallow on cold, calm, clear nights (inversions trap pollution).
- Box model per species, solved exactly each hour: dC/dt = source / BLH - rate * (C - background),
  rate = wind * 3600 / 15000 m + 0.08 per mm of rain + first-order loss of the species.
  source = k_traffic * traffic + k_heating * heating + k_industry * industry (table SOURCES):
  pm25 4000/2500/1200, background 5 ug/m3; coarse (pm10 - pm25) 1500/300/600 plus wind-blown dust;
  NOx 5000/800/800 ppb; SO2 120/900/1500 ppb; CO 60/80/20 ppm.
- Activities: traffic follows civil time (CET with DST): rush hours 08 and 17:30, weekend 0.65 / 0.5,
  a day-to-day AR(1) factor; heating = max(0, 15.5 C - 24 h mean temperature) / 15; industry
  constant (0.6 on Sundays). Site types scale them (SITE_ACTIVITY).
- Photochemistry: oxidant Ox = 32 + 12 * summer + 25 * sun * clip((T - 12) / 15, 0, 1.5) ppb;
  NO titrates O3 into NO2 (stronger at night): O3 + NO2 = Ox + primary NO2 (15 % of NOx).
- Instruments: per-station gain U(0.9, 1.1) and offset, 3 % noise; PM monitors see hygroscopic
  growth 1 + 0.3 * (RH / 100)^6.

City-specific shift (DEMO_PROFILES): traffic / heating / industry levels, climate offset, wind
factor, instrument calibrations, and the auxiliary traffic index `aux`:
- arlenvik, brumeholt, elsquay: aux = 100 * traffic activity * site traffic factor (5 % noise): it
  measures the traffic that emits, so aux -> pm25 holds ("drives").
- corvessa, fenlowe: aux is unrelated AR(1) noise around 100 ("noise").
- dunmarrow: aux = 250 - the linked index: it falls when traffic rises ("reversed").
A model that leans on aux learns a relation that holds in three cities and breaks in three; weather
-> pollution relations hold everywhere. This is what an invariance penalty should exploit.

Delivery defects (deliver.py, defects.py): short gaps at every station, a multi-day outage at one
station per city, sentinels, impossible values (PM2.5 -5, RH 130), unparseable cells ("ERR"), exact
and conflicting duplicate rows, a row from an unknown station, a logger stamp inside the skipped
spring hour, and (jsonl) a truncated line. The returned summary counts each of them.
"""

import zlib
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.demo.deliver import render_city
from pipeline.demo.simulate import DEMO_PROFILES, profile_of, simulate
from pipeline.errors import InputError
from pipeline.atomic import write_text_atomic
from pipeline.ingest.formats import validate_format


def generate_demo(raw_dir, stations: pd.DataFrame, cities_formats: dict, start: str, days: int, seed: int,
                  reference_temperature_c: float = 25.0) -> dict:
    """Write every configured city's raw dump under raw_dir; return a summary of what was written.

    Files already matching a city's `files` pattern are removed first, so a shorter rerun leaves no
    stale months behind. Same arguments -> byte-identical files.
    """
    if int(days) < 1:
        raise InputError(f"days must be at least 1, got {days}", field="generator.days")
    known = set(stations["city"])
    missing = [c for c in cities_formats if c not in known]
    if missing:
        raise InputError(f"city '{missing[0]}' has a format but no station in the station table",
                         field=f"cities.{missing[0]}")
    chosen = stations[stations["city"].isin(list(cities_formats))]
    truth = simulate(chosen, start, int(days), int(seed), reference_temperature_c)
    raw = Path(raw_dir)
    summary = {"start": str(start), "days": int(days), "seed": int(seed),
               "reference_temperature_c": float(reference_temperature_c), "cities": {}}
    for position, city in enumerate(sorted(cities_formats)):
        spec = validate_format(city, cities_formats[city], reference_temperature_c)
        rng = np.random.default_rng([int(seed), 2, zlib.crc32(city.encode())])
        files, injected = render_city(truth[city], city, spec, rng, reference_temperature_c)
        for stale in raw.glob(spec["files"]):
            if stale.is_file():
                stale.unlink()
        for relative, text in files.items():
            write_text_atomic(text, raw / relative)
        profile = profile_of(city, position)  # same position simulate() gave the city
        summary["cities"][city] = {"layout": spec["layout"], "files": sorted(files),
                                   "aux_link": profile.aux_link, **injected}
    return summary


__all__ = ["generate_demo", "simulate", "DEMO_PROFILES"]
