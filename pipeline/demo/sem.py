"""Known-answer scenario: linear structural equations with an invariant and a spurious path.

Reads nothing from disk; `write_sem_dump` writes `<raw_dir>/<environment>/<environment>.csv` (wide CSV,
UTC) for every environment of the config, one environment per city of config/stations_sem.csv.
Config keys obeyed (`data.generator` of config/data/sem.yaml): start, days, seed, lags {x1, y, x2},
delivery {x1, y, x2: [offset, factor]}, environments {name: {s2, x2_noise_var, x2_sign}}.

Two forms of the introductory example of IRMv1 (Arjovsky, Bottou, Gulrajani, Lopez-Paz 2019,
"Invariant Risk Minimization", arXiv:1907.02893, the example of its section 1):

(a) `intro_example`, independent draws: X1 ~ N(0, s2), Y = X1 + N(0, s2), X2 = sign * Y + N(0, v),
    v = 1 in the paper. Known answers: regressing Y on (X1, X2) gives (1/(s2+1), s2/(s2+1)) in one
    environment and the same with the mean s2 when equal-size environments are pooled; the invariant
    predictor is (1, 0).

(b) `simulate_series`, hourly series in which every variable also depends on its own past. At hour t a
    latent state U_t = X1_t + rho * Y_t + E_t (E_t ~ N(0, s2)) forms; the target sees it one hour later,
    Y_{t+1} = U_t (a transport delay), while the spurious sensor X2 sees it at once:
        X1_t = phi * X1_{t-1} + N(0, s2 (1 - phi^2))      (stationary variance s2, as in form (a))
        Y_{t+1} = X1_t + rho * Y_t + E_t
        X2_t = sign * U_t + psi * X2_{t-1} + N(0, v)
    A forecaster of Y_{t+1} from hours <= t then faces form (a) exactly, with X1 replaced by the
    invariant part X1_t + rho * Y_t and X2 by X2_t - psi * X2_{t-1}: in one environment the best linear
    forecast weighs them 1/(s2+v) * (v, s2) (the paper's coefficients for v = 1), and the invariant
    forecast X1_t + rho * Y_t has error variance s2 whatever v or sign are. Everything is causal in time.

Values are delivered in canonical units through an affine map (offset + factor * value): Y as pm25,
X1 as temp_c, X2 as aux; no other variable is delivered, so windows drop the rest as features.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.errors import InputError, check_keys
from pipeline.atomic import write_text_atomic

DUMP_COLUMNS = {"x1": "X1", "y": "Y", "x2": "X2"}  # SEM variable -> column name in the raw dump
BURN_IN_HOURS = 500  # discarded so every series starts from its stationary distribution
ENVIRONMENT_KEYS = {"s2", "x2_noise_var", "x2_sign"}


def environment_params(name: str, values: dict) -> dict:
    """{s2, x2_noise_var, x2_sign} of one environment, checked; defaults are the paper's (v = 1, +1)."""
    values = dict(values or {})
    check_keys(values, ENVIRONMENT_KEYS, f"data.generator.environments.{name}")
    params = {"s2": values.get("s2"), "x2_noise_var": values.get("x2_noise_var", 1.0),
              "x2_sign": values.get("x2_sign", 1.0)}
    for key in ("s2", "x2_noise_var"):
        if not isinstance(params[key], (int, float)) or not params[key] > 0:
            raise InputError(f"must be a number > 0, got {params[key]!r}",
                             field=f"data.generator.environments.{name}.{key}")
    if params["x2_sign"] not in (1, -1, 1.0, -1.0):
        raise InputError(f"must be 1 or -1, got {params['x2_sign']!r}",
                         field=f"data.generator.environments.{name}.x2_sign")
    return {k: float(v) for k, v in params.items()}


def intro_example(s2: float, n: int, rng: np.random.Generator, x2_noise_var: float = 1.0,
                  x2_sign: float = 1.0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Form (a): n independent draws (x1, y, x2) of one environment."""
    x1 = rng.normal(0.0, np.sqrt(s2), n)
    y = x1 + rng.normal(0.0, np.sqrt(s2), n)
    x2 = x2_sign * y + rng.normal(0.0, np.sqrt(x2_noise_var), n)
    return x1, y, x2


def single_environment_coefficients(s2: float, x2_noise_var: float = 1.0) -> tuple[float, float]:
    """Population least-squares weights of Y on (X1, X2) in one environment of form (a) (sign +1).

    With v = 1 this is the paper's (1/(s2+1), s2/(s2+1)) (IRM paper, introductory example); for general v the same
    algebra gives (v/(s2+v), s2/(s2+v)).
    """
    return x2_noise_var / (s2 + x2_noise_var), s2 / (s2 + x2_noise_var)


def simulate_series(params: dict, hours: int, rng: np.random.Generator, lags: dict) -> pd.DataFrame:
    """Form (b): `hours` consecutive hours of (x1, y, x2) for one station of one environment."""
    phi, rho, psi = (float(lags[k]) for k in ("x1", "y", "x2"))
    for key, value in (("x1", phi), ("y", rho), ("x2", psi)):
        if not -1.0 < value < 1.0:
            raise InputError(f"must lie in (-1, 1) for a stationary series, got {value!r}",
                             field=f"data.generator.lags.{key}")
    s2, v, sign = params["s2"], params["x2_noise_var"], params["x2_sign"]
    total = hours + BURN_IN_HOURS
    e1 = rng.normal(0.0, np.sqrt(s2 * (1.0 - phi ** 2)), total)
    ey = rng.normal(0.0, np.sqrt(s2), total)
    e2 = rng.normal(0.0, np.sqrt(v), total)
    x1, y, x2 = np.zeros(total), np.zeros(total + 1), np.zeros(total)
    for t in range(total):  # a plain loop: each hour needs the previous one (a few thousand hours)
        x1[t] = (phi * x1[t - 1] if t else 0.0) + e1[t]
        latent = x1[t] + rho * y[t] + ey[t]
        y[t + 1] = latent
        x2[t] = sign * latent + (psi * x2[t - 1] if t else 0.0) + e2[t]
    keep = slice(BURN_IN_HOURS, total)
    return pd.DataFrame({"x1": x1[keep], "y": y[:-1][keep], "x2": x2[keep]})


def delivery_map(generator: dict) -> dict[str, tuple[float, float]]:
    """SEM variable -> (offset, factor) of the delivered canonical value."""
    delivery = generator.get("delivery") or {}
    mapping = {}
    for key in DUMP_COLUMNS:
        pair = delivery.get(key)
        if not (isinstance(pair, (list, tuple)) and len(pair) == 2 and float(pair[1]) != 0.0):
            raise InputError(f"needs [offset, factor] with factor != 0, got {pair!r}",
                             field=f"data.generator.delivery.{key}")
        mapping[key] = (float(pair[0]), float(pair[1]))
    return mapping


def write_sem_dump(raw_dir, stations: pd.DataFrame, generator: dict, days: int | None = None) -> dict:
    """Write one wide CSV per environment (city); returns a summary {environment: rows}."""
    environments = generator.get("environments") or {}
    cities = sorted(stations["city"].astype(str).unique())
    missing = sorted(set(cities) - set(environments))
    if missing:
        raise InputError(f"station table cities without SEM parameters: {missing}",
                         field="data.generator.environments")
    days = int(days or generator["days"])
    if days < 1:
        raise InputError(f"must be >= 1, got {days}", field="data.generator.days")
    hours = 24 * days
    delivery = delivery_map(generator)
    times = pd.date_range(pd.Timestamp(generator["start"], tz="UTC"), periods=hours, freq="h")
    rng = np.random.default_rng(int(generator["seed"]))
    summary = {}
    for city in cities:  # sorted, and one generator stream: the dump is a function of the config
        params = environment_params(city, environments[city])
        frames = []
        for station_id in sorted(stations.loc[stations["city"] == city, "station_id"].astype(str)):
            series = simulate_series(params, hours, rng, generator["lags"])
            frame = pd.DataFrame({"station": station_id, "time_utc": times.strftime("%Y-%m-%d %H:%M")})
            for key, column in DUMP_COLUMNS.items():
                offset, factor = delivery[key]
                frame[column] = np.round(offset + factor * series[key].to_numpy(), 5)
            frames.append(frame)
        table = pd.concat(frames, ignore_index=True)
        write_text_atomic(table.to_csv(index=False, lineterminator="\n"), Path(raw_dir) / city / f"{city}.csv")
        summary[city] = len(table)
    return summary
