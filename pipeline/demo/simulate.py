"""The invented scenario's physics: hourly weather and pollution for every station, in canonical units.

Reads and writes nothing; pure function of (stations, start, days, seed). Obeys the data-config keys
`generator.start`, `generator.days`, `generator.seed` (through generate_demo) and
`reference_temperature_c` (ppb -> ug/m3 for the canonical output).

The mechanism (identical in every city) and the city-specific shift are documented, with every
parameter value, in pipeline/demo/__init__.py and docs/demo-scenario.md. Constants below carry the same
names as there.
"""

import zlib
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.signal import lfilter

from pipeline.units import conversion_to_canonical

# ---- shared mechanism (the invariant part) --------------------------------------------------------
MIXING_LENGTH_M = 15000.0  # wind ventilates a box this long: rate = wind_speed * 3600 / L per hour
WASHOUT_PER_MM = 0.08  # extra removal rate per mm of rain in the hour
BLH_NIGHT_M, BLH_SUN_M, BLH_WIND_M_PER_MS = 120.0, 1400.0, 90.0  # mixing height proxy
CIVIL_TIME_ZONE = "CET"  # people keep this clock (with DST): rush hours follow it
# Source strength per unit of activity (concentration unit * m / h), and background, per species.
SOURCES = {  # species: (traffic, heating, industry, background, first-order loss per hour)
    "pm25": (4000.0, 2500.0, 1200.0, 5.0, 0.04),   # ug/m3
    "coarse": (1500.0, 300.0, 600.0, 6.0, 0.15),   # ug/m3 (pm10 - pm25), also wind-blown dust
    "nox": (5000.0, 800.0, 800.0, 3.0, 0.10),      # ppb
    "so2": (120.0, 900.0, 1500.0, 0.5, 0.05),      # ppb
    "co": (60.0, 80.0, 20.0, 0.15, 0.01),          # ppm
}
DUST_PER_MS = 400.0  # coarse source per (wind - 4 m/s)^1.5 when dry
SITE_ACTIVITY = {  # site type: (traffic, heating, industry) multipliers of the city levels
    "urban_traffic": (1.6, 1.0, 0.2), "urban_background": (1.0, 1.0, 0.2), "suburban": (0.6, 0.8, 0.1),
    "rural_background": (0.25, 0.5, 0.05), "industrial": (0.8, 0.8, 2.5), "airport": (1.0, 1.0, 1.0),
}


@dataclass(frozen=True)
class CityProfile:
    """City-specific shift. aux_link: 'drives' (aux measures the traffic activity that emits),
    'noise' (aux is unrelated), 'reversed' (aux falls when traffic rises)."""
    traffic_level: float
    heating_level: float
    industry_level: float
    aux_link: str
    climate_offset_c: float = 0.0
    wind_factor: float = 1.0


DEMO_PROFILES = {
    "arlenvik": CityProfile(1.0, 1.0, 1.0, "drives"),
    "brumeholt": CityProfile(1.3, 0.8, 1.5, "drives", 0.5, 1.1),
    "corvessa": CityProfile(0.8, 1.6, 0.6, "noise", -1.5, 0.7),
    "dunmarrow": CityProfile(1.1, 0.9, 2.0, "reversed", 0.8, 1.2),
    "elsquay": CityProfile(0.9, 1.2, 0.8, "drives", 0.3, 1.0),
    "fenlowe": CityProfile(0.7, 1.1, 0.4, "noise", -0.5, 0.9),
}
_FALLBACK = (CityProfile(1.0, 1.0, 1.0, "drives"), CityProfile(1.0, 1.0, 1.0, "noise"))


def profile_of(city: str, position: int) -> CityProfile:
    """Demo cities have documented profiles; any other city alternates drives/noise by position."""
    return DEMO_PROFILES.get(city, _FALLBACK[position % 2])


def _ar1(rng, phi: float, sigma: float, shape) -> np.ndarray:
    """AR(1) series along axis 0 started in its stationary distribution."""
    shocks = rng.normal(0.0, sigma, size=shape)
    shocks[0] /= np.sqrt(1.0 - phi ** 2)
    return lfilter([1.0], [1.0, -phi], shocks, axis=0)


def _city_rng(seed: int, city: str):
    return np.random.default_rng([seed, 1, zlib.crc32(city.encode())])


def _traffic_shape(local_hour: np.ndarray, weekday: np.ndarray) -> np.ndarray:
    rush = 0.9 * np.exp(-((local_hour - 8.0) / 1.5) ** 2) + 0.8 * np.exp(-((local_hour - 17.5) / 2.0) ** 2)
    day = np.where((local_hour >= 7) & (local_hour <= 20), 0.35, 0.0)
    week = np.select([weekday == 5, weekday == 6], [0.65, 0.5], 1.0)
    return (0.25 + rush + day) * week


def simulate(stations: pd.DataFrame, start: str, days: int, seed: int,
             reference_temperature_c: float = 25.0) -> dict[str, pd.DataFrame]:
    """{city: table of station_id, time (UTC) and every canonical variable, canonical units}."""
    times = pd.date_range(pd.Timestamp(start, tz="UTC"), periods=days * 24, freq="h")
    hours = len(times)
    doy = times.day_of_year.to_numpy(float) + times.hour.to_numpy() / 24.0
    season = -np.cos(2 * np.pi * (doy - 20.0) / 365.25)  # -1 mid-January, +1 mid-July
    summer = (1.0 + season) / 2.0
    civil = times.tz_convert(CIVIL_TIME_ZONE)
    traffic_shape = _traffic_shape(civil.hour.to_numpy(float), civil.day_of_week.to_numpy())
    daytime_heating = np.where((civil.hour >= 6) & (civil.hour <= 22), 1.0, 0.6)
    regional = np.random.default_rng([seed, 0])
    reg_temp = _ar1(regional, 0.97, 0.6, hours)
    reg_press = _ar1(regional, 0.995, 0.5, hours)
    reg_wind = _ar1(regional, 0.95, 0.15, hours)
    reg_wet = _ar1(regional, 0.9, 0.45, hours)
    reg_dir = 240.0 + np.cumsum(regional.normal(0.0, 8.0, hours))
    reg_ozone = _ar1(regional, 0.98, 0.3, hours)
    out = {}
    for position, city in enumerate(sorted(stations["city"].unique())):
        group = stations[stations["city"] == city].sort_values("station_id").reset_index(drop=True)
        out[city] = _simulate_city(city, position, group, times, doy, summer, traffic_shape,
                                   daytime_heating, (reg_temp, reg_press, reg_wind, reg_wet, reg_dir,
                                                     reg_ozone), seed, reference_temperature_c)
    return out


def _simulate_city(city, position, group, times, doy, summer, traffic_shape, daytime_heating, regional,
                   seed, reference_temperature_c) -> pd.DataFrame:
    reg_temp, reg_press, reg_wind, reg_wet, reg_dir, reg_ozone = regional
    profile = profile_of(city, position)
    rng = _city_rng(seed, city)
    hours, n = len(times), len(group)
    # The invented region keeps a northern calendar (coldest mid-January, CET summer time) though its
    # map lies south of the equator: the sun is computed for the latitude's distance from the equator,
    # so daylight stays in phase with that calendar (a map mirrored across the equator sees the same sun).
    lat = np.radians(abs(group["lat"].to_numpy(float).mean()))
    lon = group["lon"].to_numpy(float).mean()
    elevation = group["elevation_m"].to_numpy(float)  # per station
    # City weather: 0.8 regional + 0.6 local keeps the variance of each anomaly near one.
    temp_anom = 0.8 * reg_temp + 0.6 * _ar1(rng, 0.97, 0.6, hours)
    wet = 0.8 * reg_wet + 0.6 * _ar1(rng, 0.9, 0.45, hours)
    wind_anom = 0.8 * reg_wind + 0.6 * _ar1(rng, 0.95, 0.15, hours)
    raining = wet > 1.2
    precip = np.where(raining, rng.gamma(0.9, 1.3, hours) * (wet - 0.9), 0.0)
    cloud = 1.0 / (1.0 + np.exp(-2.0 * (wet - 0.3)))
    solar_hour = times.hour.to_numpy(float) + lon / 15.0
    declination = np.radians(23.44) * np.sin(2 * np.pi * (284.0 + doy) / 365.0)
    sin_elevation = (np.sin(lat) * np.sin(declination) + np.cos(lat) * np.cos(declination)
                     * np.cos(np.radians(15.0 * (solar_hour - 12.0))))
    sun = np.clip(sin_elevation, 0.0, None) * (1.0 - 0.6 * cloud)
    season_temp = 9.5 + profile.climate_offset_c + 9.5 * (2 * summer - 1)
    diurnal = 4.5 * (1.0 - 0.5 * cloud) * np.cos(2 * np.pi * (solar_hour - 15.0) / 24.0)
    temp_city = season_temp + diurnal + 2.0 * temp_anom
    wind_city = np.clip(3.2 * profile.wind_factor * np.exp(wind_anom - 0.1) * (1.0 + 0.35 * sun), 0.2, 30)
    blh = BLH_NIGHT_M + BLH_SUN_M * sun * (0.55 + 0.45 * summer) + BLH_WIND_M_PER_MS * wind_city
    daily_temp = pd.Series(temp_city).rolling(24, min_periods=1).mean().to_numpy()
    heating = np.clip((15.5 - daily_temp) / 15.0, 0.0, None) * daytime_heating
    day_index = (np.arange(hours) // 24)
    day_factor = np.exp(_ar1(rng, 0.6, 0.12, day_index[-1] + 1))[day_index]
    activity = traffic_shape * day_factor * (1.0 + 0.05 * rng.normal(size=hours))  # the true traffic
    industry = np.where(times.day_of_week == 6, 0.6, 1.0)

    multipliers = np.array([SITE_ACTIVITY[t] for t in group["site_type"]])  # (n, 3)
    drivers = {"traffic": profile.traffic_level * multipliers[:, 0][None, :] * activity[:, None],
               "heating": profile.heating_level * multipliers[:, 1][None, :] * heating[:, None],
               "industry": profile.industry_level * multipliers[:, 2][None, :] * industry[:, None]}
    dust = DUST_PER_MS * np.clip(wind_city - 4.0, 0.0, None) ** 1.5 * (~raining)
    ventilation = wind_city * 3600.0 / MIXING_LENGTH_M + WASHOUT_PER_MM * precip
    species = {}
    for name, (k_traffic, k_heat, k_industry, background, loss) in SOURCES.items():
        source = k_traffic * drivers["traffic"] + k_heat * drivers["heating"] + k_industry * drivers["industry"]
        if name == "coarse":
            source = source + dust[:, None]
        rate = (ventilation + loss)[:, None] * np.ones((1, n))
        gain = source / blh[:, None]
        species[name] = _box_model(gain, rate, background)

    # Photochemistry: total oxidant Ox = O3 + NO2 is conserved while NO titrates O3 into NO2.
    oxidant = 32.0 + 12.0 * summer + 4.0 * reg_ozone + 25.0 * sun * np.clip((temp_city - 12.0) / 15.0, 0, 1.5)
    nox = species["nox"]
    titration = (0.5 + 0.4 * (1.0 - sun))[:, None]
    converted = np.minimum(0.85 * nox * titration, 0.9 * oxidant[:, None])
    no2_ppb = 0.15 * nox + converted
    o3_ppb = oxidant[:, None] - converted

    station_temp = temp_city[:, None] - 0.0065 * (elevation - elevation.mean())[None, :] \
        + rng.normal(0.0, 0.3, (hours, n))
    depression = np.clip(6.0 + 6.0 * sun - 5.0 * raining - 1.5 * wet, 0.2, 25.0)
    dew = station_temp - depression[:, None]
    rh = np.clip(100.0 * np.exp(17.625 * dew / (243.04 + dew) - 17.625 * station_temp / (243.04 + station_temp))
                 + rng.normal(0.0, 1.5, (hours, n)), 3.0, 100.0)
    growth = 1.0 + 0.3 * (rh / 100.0) ** 6  # hygroscopic growth seen by the PM monitor

    def measured(true, offset_scale, noise_fraction=0.03):
        """Instrument: per-station gain and offset (calibration), 3 % noise, no negative readings."""
        gain, offset = rng.uniform(0.9, 1.1, n)[None, :], rng.normal(0.0, offset_scale, n)[None, :]
        noise = 1.0 + noise_fraction * rng.normal(size=true.shape)
        return np.clip(true * gain * noise + offset, 0.0, None)

    def to_canonical(variable, values, unit):
        return conversion_to_canonical(variable, unit, reference_temperature_c).apply(values)

    pm25 = measured(species["pm25"] * growth, 1.5)
    columns = {
        "pm25": pm25,
        "pm10": pm25 + measured(species["coarse"], 1.0),
        "no2": to_canonical("no2", measured(no2_ppb, 1.0), "ppb"),
        "co": to_canonical("co", measured(species["co"], 0.02), "ppm"),
        "o3": to_canonical("o3", measured(o3_ppb, 1.0), "ppb"),
        "so2": to_canonical("so2", measured(species["so2"], 0.3), "ppb"),
        "temp_c": station_temp,
        "rh_pct": rh,
        "wind_speed_ms": np.clip(wind_city[:, None] * np.exp(rng.normal(0, 0.1, (hours, n))), 0.0, None),
        "wind_dir_deg": np.mod(reg_dir[:, None] + 15.0 * position + rng.normal(0, 10.0, (hours, n)), 360.0),
        "pressure_hpa": (1013.25 * np.exp(-elevation / 8434.0))[None, :] + 1.6 * reg_press[:, None]
        + rng.normal(0.0, 0.2, (hours, n)),
        "precip_mm": np.repeat(precip[:, None], n, axis=1),
        "aux": _aux(profile, rng, activity, multipliers[:, 0], hours, n),
    }
    frame = {"station_id": np.repeat(group["station_id"].to_numpy()[None, :], hours, axis=0).ravel(order="F"),
             "time": np.tile(times.to_numpy(), n)}
    for name, values in columns.items():
        frame[name] = values.ravel(order="F")  # station-major: all hours of station 1, then 2, ...
    return pd.DataFrame(frame)


def _box_model(gain: np.ndarray, rate: np.ndarray, background: float) -> np.ndarray:
    """dC/dt = gain - rate * (C - background), solved exactly over each hour (stable for any rate)."""
    decay = np.exp(-rate)
    equilibrium = background + gain / rate
    out = np.empty_like(gain)
    level = equilibrium[0]
    for hour in range(gain.shape[0]):
        level = equilibrium[hour] + (level - equilibrium[hour]) * decay[hour]
        out[hour] = level
    return out


def _aux(profile: CityProfile, rng, activity, site_traffic, hours, n) -> np.ndarray:
    """The auxiliary traffic index: tracks emitting traffic, is unrelated noise, or runs reversed."""
    local = (100.0 * activity[:, None] * site_traffic[None, :]) * (1.0 + 0.05 * rng.normal(size=(hours, n)))
    if profile.aux_link == "drives":
        return local
    if profile.aux_link == "reversed":
        return np.clip(250.0 - local, 0.0, None)
    return np.clip(100.0 + 25.0 * _ar1(rng, 0.9, np.sqrt(1 - 0.81), (hours, n)), 0.0, None)
