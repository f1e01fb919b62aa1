"""The shared training loop: balanced batches, bitwise determinism, early stopping, warm-up, evaluation."""


import numpy as np
import pytest
import torch
from torch import nn

from pipeline import train_loop
from pipeline.errors import InputError
from pipeline.models.networks import LinearMap, MLPNet
from pipeline.penalties import ERMPenalty, build_penalty
from pipeline.train_loop import (EnvironmentBalancedSampler, FitConfig, predict_network,
                                 train_network)

from tiny_windows import TinyWindows

torch.set_num_threads(1)


def make_windows(sizes=(60, 20, 5), lookback=6, n_features=2, horizon=3, seed=0) -> TinyWindows:
    """Unequal environments; y is a linear function of X plus noise, so a linear map can learn it."""
    rng = np.random.default_rng(seed)
    n = sum(sizes)
    X = rng.normal(size=(n, lookback, n_features)).astype(np.float32)
    y = (X[:, -1, :1] * np.array([[1.0, 0.5, 0.25]]) + 0.1 * rng.normal(size=(n, horizon))).astype(np.float32)
    env = np.repeat(np.arange(len(sizes)), sizes).astype(np.int64)
    return TinyWindows(X=X, y=y, env=env, env_names=["a", "b", "c"][: len(sizes)])


def mlp():
    return MLPNet(6, 2, 3, hidden=8, layers=1, dropout=0.1)  # dropout on: determinism must cover it


def test_sampler_balances_environments_and_is_seeded():
    env = np.repeat([0, 1, 2], [100, 10, 3])
    sampler = EnvironmentBalancedSampler(env, batch_size=30, generator=torch.Generator().manual_seed(4))
    twin = EnvironmentBalancedSampler(env, batch_size=30, generator=torch.Generator().manual_seed(4))
    other = EnvironmentBalancedSampler(env, batch_size=30, generator=torch.Generator().manual_seed(5))
    seen_small = set()
    for _ in range(20):
        batch, twin_batch = sampler.next_batch(), twin.next_batch()
        other.next_batch()  # advance the differently seeded sampler in step
        assert [len(b) for b in batch] == [10, 10, 10]  # batch_size // E of every environment
        for e, indices in enumerate(batch):
            assert (env[indices.numpy()] == e).all()
        assert all(torch.equal(x, y) for x, y in zip(batch, twin_batch))
        seen_small.update(batch[2].tolist())
    assert seen_small == {110, 111, 112}  # with replacement: the 3-window environment fills 10 slots
    assert not all(torch.equal(x, y) for x, y in zip(sampler.next_batch(), other.next_batch()))


class RecordingERM(ERMPenalty):
    def __init__(self):
        super().__init__()
        self.batch_shapes = []

    def __call__(self, preds_by_env, targets_by_env, step):
        self.batch_shapes.append([tuple(p.shape) for p in preds_by_env])
        return super().__call__(preds_by_env, targets_by_env, step)


def test_every_training_batch_holds_every_environment():
    penalty = RecordingERM()
    train_network(mlp, make_windows(), penalty=penalty,
                  fit_config=FitConfig(max_steps=5, batch_size=32, eval_every=5))
    assert penalty.batch_shapes == [[(10, 3), (10, 3), (10, 3)]] * 5


def test_same_seed_gives_bitwise_identical_weights_and_leaves_global_rng_alone():
    windows, cfg = make_windows(), FitConfig(max_steps=20, batch_size=24, eval_every=10, lr=1e-2)
    rng_before = torch.get_rng_state()
    first, _ = train_network(mlp, windows, penalty=build_penalty("irm", weight=3.0, warmup_steps=5),
                             fit_config=cfg, seed=11)
    second, _ = train_network(mlp, windows, penalty=build_penalty("irm", weight=3.0, warmup_steps=5),
                              fit_config=cfg, seed=11)
    assert torch.equal(torch.get_rng_state(), rng_before)
    for (name, a), (_, b) in zip(first.state_dict().items(), second.state_dict().items()):
        assert torch.equal(a, b), name
    third, _ = train_network(mlp, windows, fit_config=cfg, seed=12)
    assert not torch.equal(first.state_dict()["head.weight"], third.state_dict()["head.weight"])


def test_a_reused_groupdro_penalty_is_reset_so_refits_match():
    windows, cfg = make_windows(), FitConfig(max_steps=8, batch_size=24, eval_every=4)
    penalty = build_penalty("groupdro", weight=1.0, eta=1.0)
    first, _ = train_network(mlp, windows, penalty=penalty, fit_config=cfg, seed=0)
    second, _ = train_network(mlp, windows, penalty=penalty, fit_config=cfg, seed=0)
    assert all(torch.equal(a, b) for a, b in zip(first.state_dict().values(), second.state_dict().values()))


class ConstantForecast(nn.Module):
    """A plateau by construction: the parameter gets a zero gradient, so validation never improves."""

    def __init__(self):
        super().__init__()
        self.weight = nn.Parameter(torch.ones(1))

    def forward(self, X):
        return 0.0 * self.weight * X[:, -3:, 0]


def test_early_stopping_on_a_plateau():
    windows = make_windows()
    _, result = train_network(ConstantForecast, windows, val={"source": make_windows(seed=1)},
                              fit_config=FitConfig(max_steps=1000, eval_every=5, patience=3))
    # First evaluation sets the best value; three more without improvement stop the fit.
    assert result.stop_reason == "early_stopping"
    assert result.final_step == 20 and result.best_step == 5
    assert sorted(result.snapshots) == [5, 10, 15, 20]


class Exploding(ConstantForecast):
    def forward(self, X):
        return super().forward(X) + float("inf")


def test_a_non_finite_loss_stops_the_fit_and_still_leaves_a_snapshot():
    _, result = train_network(Exploding, make_windows(), val={"source": make_windows(seed=1)},
                              fit_config=FitConfig(max_steps=50, eval_every=5))
    assert result.stop_reason == "non_finite_loss" and result.final_step == 0
    assert sorted(result.snapshots) == [0] and [e["step"] for e in result.history] == [0]


def test_no_early_stopping_without_a_source_set():
    _, result = train_network(ConstantForecast, make_windows(), val={"target": make_windows(seed=1)},
                              fit_config=FitConfig(max_steps=30, eval_every=5, patience=1))
    assert result.stop_reason == "max_steps" and result.final_step == 30 and result.best_step is None
    assert "val/target/all" in result.history[-1]


def test_warmup_weight_in_history_and_optimizer_rebuilt_at_the_switch(monkeypatch):
    built = []
    real_make_optimizer = train_loop.make_optimizer
    monkeypatch.setattr(train_loop, "make_optimizer", lambda *a: built.append(1) or real_make_optimizer(*a))
    _, result = train_network(mlp, make_windows(), penalty=build_penalty("vrex", weight=4.0, warmup_steps=10),
                              fit_config=FitConfig(max_steps=20, batch_size=24, eval_every=5))
    assert [e["penalty_weight"] for e in result.history] == [0.0, 0.0, 4.0, 4.0]
    assert len(built) == 2  # initial optimizer + fresh one when the weight switches on


def test_validation_risks_are_mse_overall_and_per_environment():
    val = make_windows(sizes=(7, 4), seed=3)
    network, result = train_network(lambda: LinearMap(6, 2, 3), make_windows(), val={"source": val},
                                    fit_config=FitConfig(max_steps=4, eval_every=4))
    entry = result.history[-1]
    squared = (predict_network(network, val.X) - val.y) ** 2
    assert entry["val/source/all"] == pytest.approx(squared.mean(), rel=1e-6)
    assert entry["val/source/a"] == pytest.approx(squared[:7].mean(), rel=1e-6)
    assert entry["val/source/b"] == pytest.approx(squared[7:].mean(), rel=1e-6)
    assert {"train_loss", "penalty_value", "train/risk/a", "train/risk/b", "train/risk/c"} <= set(entry)
    assert result.fit_seconds > 0 and torch.get_num_threads() == 1


def test_learning_actually_reduces_the_validation_risk():
    val = make_windows(seed=2)
    _, result = train_network(lambda: LinearMap(6, 2, 3), make_windows(), val={"source": val},
                              fit_config=FitConfig(max_steps=200, eval_every=50, lr=3e-2, batch_size=30))
    # Predicting the mean would score var(y) ~ 0.45; the noise floor is 0.1^2 = 0.01.
    assert result.history[-1]["val/source/all"] < 0.1 * float(val.y.var())


@pytest.mark.parametrize("values,field", [({"max_steps": 0}, "fit.max_steps"),
                                          ({"lr": 0.0}, "fit.lr"),
                                          ({"grad_clip": -1.0}, "fit.grad_clip"),
                                          ({"batch_size": 2.5}, "fit.batch_size")])
def test_bad_fit_values_raise_input_error(values, field):
    with pytest.raises(InputError, match=field):
        FitConfig(**values)


def test_unknown_fit_key_is_named():
    with pytest.raises(InputError, match="unknown key 'epochs'"):
        FitConfig.from_dict({"epochs": 3})


def test_non_finite_validation_data_is_rejected():
    val = make_windows(seed=1)
    val.y[0, 0] = np.inf
    with pytest.raises(InputError, match="val/source.y: 1 non-finite values"):
        train_network(mlp, make_windows(), val={"source": val}, fit_config=FitConfig(max_steps=1))
