"""The level options (model.level: delta | revin): a model trained on one level forecasts a shifted copy of
the same series as well as the unshifted one; without them it forecasts at the training level."""

import numpy as np
import pytest
import torch

from pipeline.models import build_model
from pipeline.models import level
from pipeline.train_loop import FitConfig
from tiny_windows import TinyWindows

torch.set_num_threads(1)
LOOKBACK, HORIZON = 12, 3


def ar_windows(n: int, seed: int) -> TinyWindows:
    """Windows of an AR(1) target (feature 0, phi 0.7, around level 0) driven by an exogenous feature 1."""
    rng = np.random.default_rng(seed)
    length = n + LOOKBACK + HORIZON
    driver = rng.normal(size=length)
    target = np.zeros(length)
    for t in range(1, length):
        target[t] = 0.7 * target[t - 1] + 0.5 * driver[t - 1] + 0.3 * rng.normal()
    starts = np.arange(n)
    X = np.stack([np.stack([target[s:s + LOOKBACK], driver[s:s + LOOKBACK]], axis=1) for s in starts])
    y = np.stack([target[s + LOOKBACK:s + LOOKBACK + HORIZON] for s in starts])
    return TinyWindows(X=X.astype(np.float32), y=y.astype(np.float32), env=(starts % 2).astype(np.int64),
                       env_names=["a", "b"])


def moved(windows: TinyWindows, offset: float) -> TinyWindows:
    """The same series at another level: target inputs and targets + offset (a city of another climate)."""
    X = windows.X.copy()
    X[:, :, 0] += offset
    return TinyWindows(X=X, y=windows.y + offset, env=windows.env, env_names=windows.env_names)


TRAIN, TEST = ar_windows(800, seed=0), ar_windows(400, seed=1)
FIT = FitConfig(max_steps=200, batch_size=64, lr=0.02, eval_every=100)


def mse(model, windows) -> float:
    return float(np.mean((model.predict(windows.X).astype(np.float64) - windows.y) ** 2))


@pytest.mark.parametrize("family", ["linear", "ridge"])
@pytest.mark.parametrize("option", ["delta", "revin"])
def test_a_shifted_copy_is_forecast_as_well_as_the_original(family, option):
    model = build_model(family, {"level": option}, seed=0).fit(TRAIN, val={"source": TEST}, fit_config=FIT)
    same, shifted = mse(model, TEST), mse(model, moved(TEST, 4.0))  # 4.0 is several target std devs
    assert same < 0.8 * float(TEST.y.var())  # the model learned something (predicting the mean scores 1.0)
    assert shifted == pytest.approx(same, rel=1e-4)


@pytest.mark.parametrize("family", ["linear", "ridge"])
def test_without_an_option_the_shifted_copy_is_forecast_at_the_training_level(family):
    model = build_model(family, {}, seed=0).fit(TRAIN, val={"source": TEST}, fit_config=FIT)
    assert mse(model, moved(TEST, 4.0)) > 3 * mse(model, TEST)


def test_window_level_follows_the_revin_and_delta_definitions():
    X = ar_windows(20, seed=3).X.astype(np.float64)
    channel = X[:, :, 0]
    # RevIN (Kim et al. 2022, ICLR, section 3: instance mean and variance over the window, eps added to the
    # variance) against numpy's mean and population variance (np.var, ddof 0).
    loc, scale = level.window_level(X, 0, "revin")
    np.testing.assert_allclose(loc[:, 0], np.mean(channel, axis=1), rtol=1e-12)
    np.testing.assert_allclose(scale[:, 0], np.sqrt(np.var(channel, axis=1) + 1e-5), rtol=1e-12)
    # The same arithmetic on torch tensors (the networks' path) gives the same values.
    loc_t, scale_t = level.window_level(torch.from_numpy(X), 0, "revin")
    np.testing.assert_allclose(loc_t.numpy(), loc, rtol=1e-12)
    np.testing.assert_allclose(scale_t.numpy(), scale, rtol=1e-12)
    relative = level.relative_inputs(X, loc, scale, 0)
    np.testing.assert_allclose(relative[:, :, 1], X[:, :, 1])  # other features untouched
    np.testing.assert_allclose(relative[:, :, 0].mean(axis=1), 0.0, atol=1e-12)
    # Delta: the last observed value; the forecast is restored by adding it back.
    loc, scale = level.window_level(X, 0, "delta")
    np.testing.assert_array_equal(loc[:, 0], channel[:, -1])
    y = np.arange(60.0).reshape(20, 3)
    np.testing.assert_allclose(level.restore(level.relative_target(y, loc, scale), loc, scale), y)
