"""Seeds together (pipeline.ensemble): every seed of an ensemble fit equals, bit for bit, its fit alone."""

import numpy as np
import pytest
import torch

from pipeline.ensemble import stackable, train_ensemble
from pipeline.fit_config import FitConfig
from pipeline.models.networks import LinearMap, MLPNet, RecurrentNet
from pipeline.penalties import build_penalty
from pipeline.train_loop import predict_network, train_network

from tiny_windows import TinyWindows

torch.set_num_threads(1)
SEEDS = [0, 1, 5]


def make_windows(sizes, seed, scale=1.0) -> TinyWindows:
    rng = np.random.default_rng(seed)
    n = sum(sizes)
    X = rng.normal(size=(n, 6, 2)).astype(np.float32)
    y = (X[:, -1, :1] * np.array([[1.0, 0.5, 0.25]]) + 0.1 * rng.normal(size=(n, 3))).astype(np.float32)
    env = np.repeat(np.arange(len(sizes)), sizes).astype(np.int64)
    return TinyWindows(X=X, y=(y * scale).astype(np.float32), env=env, env_names=["a", "b", "c"][: len(sizes)])


def assert_same_fits(build, penalty_args, cfg, train, val):
    together = train_ensemble(build, train, val, build_penalty(*penalty_args), cfg, seeds=SEEDS)
    probe = make_windows((40,), seed=9).X
    for seed, (network, result) in zip(SEEDS, together):
        alone_network, alone = train_network(build, train, val, build_penalty(*penalty_args), cfg, seed=seed)
        state, alone_state = network.state_dict(), alone_network.state_dict()
        assert list(state) == list(alone_state)
        for key in state:
            assert torch.equal(state[key], alone_state[key]), (seed, key)
        assert np.array_equal(predict_network(network, probe), predict_network(alone_network, probe))
        assert result.history == alone.history
        assert (result.best_step, result.final_step, result.stop_reason) == \
            (alone.best_step, alone.final_step, alone.stop_reason)
        assert sorted(result.snapshots) == sorted(alone.snapshots)
        for step, snapshot in alone.snapshots.items():
            assert all(torch.equal(snapshot[k], result.snapshots[step][k]) for k in snapshot), (seed, step)
    return [result for _, result in together]


@pytest.mark.parametrize("build", [lambda: LinearMap(6, 2, 3), lambda: MLPNet(6, 2, 3, 8, 2, 0.0)],
                         ids=["linear", "mlp"])
@pytest.mark.parametrize("penalty_args, sampling", [(("irm", 5.0, 10), "balanced"),
                                                     (("groupdro", 1.0, 10), "pooled"),
                                                     (("vrex", 2.0, 10), "balanced")])
def test_each_seed_of_the_ensemble_is_its_fit_alone(build, penalty_args, sampling):
    train = make_windows((60, 20, 9), seed=0)
    val = {"source": make_windows((15, 15, 15), seed=1), "target": make_windows((12,), seed=2)}
    cfg = FitConfig(max_steps=60, batch_size=24, eval_every=5, patience=2, lr=2e-2, sampling=sampling)
    results = assert_same_fits(build, penalty_args, cfg, train, val)
    # the seeds really differ (own init and batches), and early stopping is exercised
    assert len({r.history[-1]["val/source/all"] for r in results}) == len(SEEDS)


def test_seeds_stop_at_their_own_step_on_early_stopping_or_divergence():
    train = make_windows((40, 40), seed=3, scale=1e15)  # squared errors near float32's range
    cfg = FitConfig(max_steps=40, batch_size=16, eval_every=3, patience=3, lr=1e3, grad_clip=0.0)
    results = assert_same_fits(lambda: LinearMap(6, 2, 3), ("irm", 1e4, 2), cfg, train,
                               {"source": make_windows((10, 10), seed=4, scale=1e15)})
    assert "non_finite_loss" in {r.stop_reason for r in results}


def test_only_affine_chains_without_dropout_are_stacked():
    assert stackable(LinearMap(6, 2, 3)) and stackable(MLPNet(6, 2, 3, 8, 3, 0.0))
    assert not stackable(MLPNet(6, 2, 3, 8, 1, 0.1))  # dropout masks come from each seed's RNG in turn
    assert not stackable(RecurrentNet("lstm", 2, 3, 8, 1, 0.0))
    with pytest.raises(ValueError, match="stacked"):
        train_ensemble(lambda: RecurrentNet("lstm", 2, 3, 8, 1, 0.0), make_windows((20, 20), seed=0), seeds=[0, 1],
                       fit_config=FitConfig(max_steps=2))


@pytest.mark.parametrize("family, params", [("linear", {}), ("mlp", {"hidden": 8}), ("lstm", {"hidden": 4})])
def test_models_fitted_together_equal_models_fitted_alone(family, params):
    from pipeline.models import build_model
    from pipeline.models.neural import TorchForecaster

    train = make_windows((40, 30), seed=0)
    val = {"source": make_windows((10, 10), seed=1)}
    cfg = {"max_steps": 30, "batch_size": 16, "eval_every": 5, "patience": 2, "lr": 2e-2}
    together = TorchForecaster.fit_together([build_model(family, params, seed=s) for s in SEEDS], train, val,
                                            build_penalty("vrex", 2.0, 5), cfg)
    probe = make_windows((20,), seed=9).X
    for seed, model in zip(SEEDS, together):
        alone = build_model(family, params, seed=seed).fit(train, val, build_penalty("vrex", 2.0, 5), cfg)
        assert (model.best_step_, model.snapshot_steps_) == (alone.best_step_, alone.snapshot_steps_)
        assert all(torch.equal(a, b) for a, b in zip(model.state_dict().values(), alone.state_dict().values()))
        assert np.array_equal(model.predict(probe), alone.predict(probe))
