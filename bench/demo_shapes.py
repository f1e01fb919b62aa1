"""Invented window sets shaped like one leave-one-city-out split of the demo, for the training benches.

48 h lookback, 14 features, 24 h horizon, three source cities; 26,000 training windows, 8,800 source
and 2,900 target validation windows: about 15 source stations x 365 days at a 3-hour stride, blocks
0.6 / 0.2 / 0.2 (config/experiment/demo.yaml, config/data/demo.yaml). Each city has 5 stations whose
windows start every 3 hours. The validation sets are thinned as the training job thins them
(`fit.validation_windows`, pipeline.train.validation_sets): non_overlapping by default, `all` for every
window. Values are random: the benches time the work, the numbers learned do not matter.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from pipeline.models import build_model  # noqa: E402

LOOKBACK, FEATURES, HORIZON = 48, 14, 24
TRAIN_PER_ENV, VAL_SOURCE_PER_ENV, VAL_TARGET = 26_000 // 3, 8_800 // 3, 2_900
STATIONS_PER_CITY, STRIDE_HOURS = 5, 3


@dataclass
class Windows:
    X: np.ndarray
    y: np.ndarray
    env: np.ndarray
    env_names: list
    station: np.ndarray
    origin: np.ndarray  # datetime64[ns]: each station's windows start every STRIDE_HOURS
    target_index: int = 0


def invented_windows(per_env: list[int], seed: int) -> Windows:
    rng = np.random.default_rng(seed)
    n = sum(per_env)
    X = rng.normal(size=(n, LOOKBACK, FEATURES)).astype(np.float32)
    y = (X[:, -HORIZON:, 0] * 0.8 + 0.2 * rng.normal(size=(n, HORIZON))).astype(np.float32)
    env = np.repeat(np.arange(len(per_env)), per_env).astype(np.int64)
    # the windows of a city go round its stations; each station's k-th window starts k strides after the first
    within = np.concatenate([np.arange(count) for count in per_env])
    station = np.array([f"city{e}_{i % STATIONS_PER_CITY}" for e, i in zip(env, within)], dtype=object)
    origin = np.datetime64("2030-01-01T00", "ns") + (within // STATIONS_PER_CITY) * np.timedelta64(STRIDE_HOURS, "h")
    return Windows(X, y, env, [f"city{e}" for e in range(len(per_env))], station, origin)


def demo_split(validation_windows: str = "non_overlapping") -> tuple[Windows, dict[str, Windows]]:
    """(training windows, {"source": ..., "target": ...} validation windows) at the demo's sizes, the
    validation sets as a fit sees them under `fit.validation_windows`."""
    val = {"source": invented_windows([VAL_SOURCE_PER_ENV] * 3, seed=2), "target": invented_windows([VAL_TARGET], seed=3)}
    if validation_windows != "all":  # imported here: `all` runs on code from before the option too
        from pipeline.train import subset
        from pipeline.windows import non_overlapping_targets

        val = {name: subset(windows, non_overlapping_targets(windows, HORIZON)) for name, windows in val.items()}
    return invented_windows([TRAIN_PER_ENV] * 3, seed=1), val


def network_builder(family: str):
    """The family's network with its default hyperparameters, built as its TorchForecaster builds it."""
    model = build_model(family, seed=0)
    model.hparams_ = model.Params()
    return lambda: model.build_network(LOOKBACK, FEATURES, HORIZON)
