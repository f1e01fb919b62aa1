"""The shared training loop: balanced batches, bitwise determinism, early stopping, warm-up, evaluation."""


import numpy as np
import pytest
import torch
from torch import nn

from pipeline import selection, train_loop
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
    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        self.batch_shapes, self.env_weights = [], []

    def objective(self, preds, targets, layout, step, env_weights=None):
        assert preds.shape == targets.shape and len(preds) == sum(layout.counts)
        self.batch_shapes.append([(count, *preds.shape[1:]) for count in layout.counts])  # rows per environment
        self.env_weights.append(env_weights)
        return super().objective(preds, targets, layout, step, env_weights=env_weights)


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
                                          ({"batch_size": 2.5}, "fit.batch_size"),
                                          ({"sampling": "stratified"}, "fit.sampling")])
def test_bad_fit_values_raise_input_error(values, field):
    with pytest.raises(InputError, match=field):
        FitConfig(**values)


def test_unknown_fit_key_is_named():
    with pytest.raises(InputError, match="fit.epochs: unknown key"):
        FitConfig.from_dict({"epochs": 3})


def test_non_finite_validation_data_is_rejected():
    val = make_windows(seed=1)
    val.y[0, 0] = np.inf
    with pytest.raises(InputError, match="val/source.y: 1 non-finite values"):
        train_network(mlp, make_windows(), val={"source": val}, fit_config=FitConfig(max_steps=1))


# ---- warm-up: selection and early stopping start when the penalty switches on ---------------------------
def test_early_stopping_counts_only_evaluations_after_the_warmup():
    windows = make_windows()
    _, result = train_network(ConstantForecast, windows, val={"source": make_windows(seed=1)},
                              penalty=build_penalty("irm", weight=5.0, warmup_steps=20),
                              fit_config=FitConfig(max_steps=1000, eval_every=5, patience=3))
    # Without the rule: best at step 5 (a warm-up model), stop at 20. With it: the plateau is first seen
    # at step 25, three more evaluations without gain stop the fit at 40.
    assert result.stop_reason == "early_stopping" and result.final_step == 40 and result.best_step == 25
    assert sorted(result.snapshots) == [25, 30, 35, 40]
    assert [e["step"] for e in result.history] == list(range(5, 45, 5))  # the curve keeps the warm-up


def test_a_penalised_run_selects_past_the_warmup_and_differs_from_its_erm_twin():
    from pipeline.models import build_model

    train = make_windows()
    # A validation target of opposite sign: the more a model learns the worse it scores, so the earliest
    # evaluation wins the whole curve. Before the fix that was a warm-up snapshot, bit-identical to the
    # ERM twin's.
    val = make_windows(seed=1)
    val.y[:] = -val.y
    cfg = FitConfig(max_steps=30, batch_size=24, eval_every=5, lr=1e-2)
    fitted = {name: build_model("linear", {}, seed=4).fit(
        train, val={"source": val}, fit_config=cfg,
        penalty=build_penalty(name, weight=10.0 if name == "irm" else 0.0, warmup_steps=10))
        for name in ("erm", "irm")}
    irm, erm = fitted["irm"], fitted["erm"]
    for model in (irm, erm):
        whole_curve = selection.curve(model.history_, "val/source/all")
        assert min(whole_curve, key=whole_curve.get) == 5  # a warm-up step would have been chosen
        assert model.snapshot_steps_ == [15, 20, 25, 30] and model.best_step_ > 10
        assert selection.choose_step(selection.HOLDOUT, model.history_, model.snapshot_steps_) == model.best_step_
    # Twins: same seed, same batches, zero penalty during the warm-up -> identical warm-up curves ...
    # (penalty_value differs: the IRM term is computed, with weight 0, during the warm-up.)
    def without_term(entries):
        return [{k: v for k, v in e.items() if k != "penalty_value"} for e in entries]
    assert without_term(irm.history_[:2]) == without_term(erm.history_[:2])
    # ... and different models once the penalty acted: the selected weights differ.
    assert not torch.equal(irm.state_dict()["head.weight"], erm.state_dict()["head.weight"])
    assert not torch.equal(irm.use_snapshot(15).state_dict()["head.weight"],
                           erm.use_snapshot(15).state_dict()["head.weight"])


def test_a_warmup_that_lasts_the_whole_fit_is_refused():
    with pytest.raises(InputError, match="penalty.warmup_steps"):
        train_network(mlp, make_windows(), penalty=build_penalty("irm", weight=1.0, warmup_steps=10),
                      fit_config=FitConfig(max_steps=10))


def test_the_erm_twin_gets_the_same_optimizer_reset(monkeypatch):
    built = []
    real_make_optimizer = train_loop.make_optimizer
    monkeypatch.setattr(train_loop, "make_optimizer", lambda *a: built.append(1) or real_make_optimizer(*a))
    train_network(mlp, make_windows(), penalty=build_penalty("erm", warmup_steps=10),
                  fit_config=FitConfig(max_steps=20, batch_size=24, eval_every=5))
    assert len(built) == 2


# ---- environments and batch composition ------------------------------------------------------------------
def test_a_penalised_fit_on_one_environment_is_refused_and_erm_is_not():
    single = make_windows(sizes=(40,))
    for name in ("irm", "vrex", "groupdro"):
        with pytest.raises(InputError, match=f"penalty {name} needs >= 2 training environments"):
            train_network(mlp, single, penalty=build_penalty(name, weight=1.0), fit_config=FitConfig(max_steps=2))
    train_network(mlp, single, penalty=build_penalty("erm"), fit_config=FitConfig(max_steps=2))


def test_split_halves_needs_two_windows_per_environment_in_a_batch():
    with pytest.raises(InputError, match="fit.batch_size.*needs 2"):
        train_network(mlp, make_windows(), penalty=build_penalty("irm", weight=1.0),
                      fit_config=FitConfig(max_steps=2, batch_size=5))  # 5 // 3 = 1 per environment
    train_network(mlp, make_windows(), penalty=build_penalty("irm", weight=1.0, estimator="squared"),
                  fit_config=FitConfig(max_steps=2, batch_size=5))


def test_pooled_sampler_follows_the_environment_sizes_and_is_seeded():
    from pipeline.fit_config import SAMPLING_MODES
    from pipeline.sampling import SAMPLERS, PooledSampler

    assert tuple(SAMPLERS) == SAMPLING_MODES  # one list of names
    env = np.repeat([0, 1, 2], [600, 300, 4])
    sampler = PooledSampler(env, batch_size=60, generator=torch.Generator().manual_seed(1), min_per_env=2)
    twin = PooledSampler(env, batch_size=60, generator=torch.Generator().manual_seed(1), min_per_env=2)
    # Shares 600/904, 300/904, 4/904 of 60 slots: 39.8, 19.9, 0.27 -> largest remainder 40, 20, 0 -> floor 2.
    assert sampler.counts == [40, 20, 2]
    np.testing.assert_allclose(sampler.risk_weights.numpy(), [600 / 904, 300 / 904, 4 / 904])
    for _ in range(5):
        batch, twin_batch = sampler.next_batch(), twin.next_batch()
        assert [len(b) for b in batch] == [40, 20, 2]
        assert all((env[b.numpy()] == e).all() for e, b in enumerate(batch))
        assert all(torch.equal(a, b) for a, b in zip(batch, twin_batch))


def test_pooled_fit_weights_environment_risks_by_their_share_and_balanced_does_not():
    windows = make_windows()  # sizes 60, 20, 5
    for sampling, expected in (("balanced", None), ("pooled", [60 / 85, 20 / 85, 5 / 85])):
        penalty = RecordingERM()
        train_network(mlp, windows, penalty=penalty,
                      fit_config=FitConfig(max_steps=2, batch_size=34, eval_every=2, sampling=sampling))
        if expected is None:
            assert penalty.env_weights == [None, None] and penalty.batch_shapes[0] == [(11, 3)] * 3
        else:
            np.testing.assert_allclose(penalty.env_weights[0].numpy(), expected)
            assert penalty.batch_shapes[0] == [(24, 3), (8, 3), (2, 3)]  # 34 x shares: 24, 8, 2


def test_gradient_clipping_equals_torchs_clip_grad_norm_bit_for_bit():
    """train_loop.clip_gradient_norms skips torch's grouping of tensors but must leave the same gradients
    as torch.nn.utils.clip_grad_norm_ (the reference), for one network and for several clipped together."""
    from pipeline.train_loop import clip_gradient_norms

    def networks_with_gradients():
        torch.manual_seed(3)
        nets = [torch.nn.Sequential(torch.nn.Linear(7, 16), torch.nn.Tanh(), torch.nn.Linear(16, 4)) for _ in range(3)]
        x = torch.randn(32, 7)
        for k, net in enumerate(nets):
            (net(x) * (k + 1) * 40).pow(2).mean().backward()  # norms well above max_norm: clipping acts
        return nets

    reference, ours = networks_with_gradients(), networks_with_gradients()
    for net in reference:
        torch.nn.utils.clip_grad_norm_(list(net.parameters()), 1.0)
    clip_gradient_norms([list(net.parameters()) for net in ours], 1.0)
    for ref_net, our_net in zip(reference, ours):
        for ref, our in zip(ref_net.parameters(), our_net.parameters()):
            assert torch.equal(ref.grad, our.grad)
