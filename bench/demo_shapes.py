"""Invented window sets shaped like one leave-one-city-out split of the demo, for the training benches.

48 h lookback, 14 features, 24 h horizon, three source cities; 26,000 training windows, 8,800 source
and 2,900 target validation windows: about 15 source stations x 365 days at a 3-hour stride, blocks
0.6 / 0.2 / 0.2 (config/experiment/demo.yaml, config/data/demo.yaml). Values are random: the benches
time the work, the numbers learned do not matter.
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


@dataclass
class Windows:
    X: np.ndarray
    y: np.ndarray
    env: np.ndarray
    env_names: list
    target_index: int = 0


def invented_windows(per_env: list[int], seed: int) -> Windows:
    rng = np.random.default_rng(seed)
    n = sum(per_env)
    X = rng.normal(size=(n, LOOKBACK, FEATURES)).astype(np.float32)
    y = (X[:, -HORIZON:, 0] * 0.8 + 0.2 * rng.normal(size=(n, HORIZON))).astype(np.float32)
    env = np.repeat(np.arange(len(per_env)), per_env).astype(np.int64)
    return Windows(X, y, env, [f"city{e}" for e in range(len(per_env))])


def demo_split() -> tuple[Windows, dict[str, Windows]]:
    """(training windows, {"source": ..., "target": ...} validation windows) at the demo's sizes."""
    return (invented_windows([TRAIN_PER_ENV] * 3, seed=1),
            {"source": invented_windows([VAL_SOURCE_PER_ENV] * 3, seed=2),
             "target": invented_windows([VAL_TARGET], seed=3)})


def network_builder(family: str):
    """The family's network with its default hyperparameters, built as its TorchForecaster builds it."""
    model = build_model(family, seed=0)
    model.hparams_ = model.Params()
    return lambda: model.build_network(LOOKBACK, FEATURES, HORIZON)
