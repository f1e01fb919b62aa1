"""Penalties against published formulas and worked values computed with numpy from the cited formulas."""

import numpy as np
import pytest
import torch

from pipeline.errors import InputError
from pipeline.penalties import (build_penalty, irm_gradient_autograd, irm_gradient_closed_form)


def t(values):
    return torch.tensor(values, dtype=torch.float64)


def constant_risk_batches(risks):
    """Per-environment (pred, target) pairs whose squared error is exactly the given risk."""
    preds = [torch.zeros(4, 1, dtype=torch.float64) for _ in risks]
    targets = [torch.full((4, 1), float(np.sqrt(r)), dtype=torch.float64) for r in risks]
    return preds, targets


# --- IRMv1: Arjovsky, Bottou, Gulrajani, Lopez-Paz (2019), arXiv:1907.02893 ------
@pytest.mark.parametrize("pred,target,grad,penalty,risk", [
    ([1, 2, 3, 4], [1.5, 1.5, 2.5, 5], -1.0, 1.0, 0.4375),  # computed from the IRM paper's closed form
    ([0.5, -1, 2], [1, -1, 1], 1.1666667, 1.3611111, 0.4166667),  # computed from the IRM paper's closed form
])
def test_irm_gradient_closed_form_equals_autograd_and_published_values(pred, target, grad, penalty, risk):
    assert float(irm_gradient_closed_form(t(pred), t(target))) == pytest.approx(grad, abs=1e-6)
    assert float(irm_gradient_autograd(t(pred), t(target)).detach()) == pytest.approx(grad, abs=1e-6)
    for method in ("closed_form", "autograd"):
        loss, logs = build_penalty("irm", weight=1.0, irm_gradient=method, estimator="squared")(
            [t(pred)], [t(target)], step=0)
        assert logs["penalty_value"] == pytest.approx(penalty, abs=1e-6)
        assert logs["risk/0"] == pytest.approx(risk, abs=1e-6)
        assert float(loss.detach()) == pytest.approx(risk + penalty, abs=1e-6)  # weight 1: no rescaling


def test_irm_closed_form_and_autograd_give_the_same_gradients_for_training():
    generator = torch.Generator().manual_seed(0)
    grads = {}
    for method in ("closed_form", "autograd"):  # with the default estimator (split_halves)
        preds = [torch.randn(16, 3, generator=generator, dtype=torch.float64).requires_grad_() for _ in range(3)]
        targets = [torch.randn(16, 3, generator=generator, dtype=torch.float64) for _ in range(3)]
        loss, _ = build_penalty("irm", weight=7.0, irm_gradient=method)(preds, targets, step=0)
        loss.backward()
        grads[method] = torch.cat([p.grad.flatten() for p in preds])
        generator.manual_seed(0)  # same draws for the second method
    torch.testing.assert_close(grads["closed_form"], grads["autograd"], rtol=1e-12, atol=1e-12)


def test_irm_penalty_averages_over_environments():
    # Our convention: mean over environments (the authors' released code averages [from memory]).
    loss, logs = build_penalty("irm", weight=1.0, estimator="squared")(
        [t([1, 2, 3, 4]), t([0.5, -1, 2])], [t([1.5, 1.5, 2.5, 5]), t([1, -1, 1])], step=0)
    assert logs["penalty_value"] == pytest.approx((1.0 + 1.3611111) / 2, abs=1e-6)
    assert float(loss) == pytest.approx((0.4375 + 0.4166667) / 2 + (1.0 + 1.3611111) / 2, abs=1e-6)


@pytest.mark.parametrize("pred,target,halves,product", [
    # computed with numpy from the IRM paper's closed form: [1,2]/[1.5,1.5] -> 0.5, [3,4]/[2.5,5] -> -2.5
    ([1, 2, 3, 4], [1.5, 1.5, 2.5, 5], (0.5, -2.5), -1.25),
    # computed likewise; an odd count gives the second half the extra window: [0.5]/[1] -> -0.5, [-1,2]/[-1,1] -> 2
    ([0.5, -1, 2], [1, -1, 1], (-0.5, 2.0), -1.0),
])
def test_irm_split_halves_is_the_product_of_the_two_half_batch_gradients(pred, target, halves, product):
    # IRMv1 paper (Arjovsky et al. 2019, arXiv:1907.02893, section 3): the unbiased minibatch estimate of the
    # squared gradient is the product of the gradients on two independent parts of the batch.
    half = len(pred) // 2
    assert float(irm_gradient_closed_form(t(pred[:half]), t(target[:half]))) == pytest.approx(halves[0])
    assert float(irm_gradient_closed_form(t(pred[half:]), t(target[half:]))) == pytest.approx(halves[1])
    for method in ("closed_form", "autograd"):
        _, logs = build_penalty("irm", weight=1.0, irm_gradient=method)([t(pred)], [t(target)], step=0)
        assert logs["penalty_value"] == pytest.approx(product, abs=1e-9)  # the default estimator
    with pytest.raises(ValueError, match="split_halves needs >= 2 windows"):
        build_penalty("irm", weight=1.0)([t([1.0])], [t([2.0])], step=0)
    assert build_penalty("irm").min_windows_per_env == 2
    assert build_penalty("irm", estimator="squared").min_windows_per_env == 1


def test_irm_split_halves_is_unbiased_and_the_squared_batch_gradient_is_biased_up():
    # 400 fixed (pred, target) pairs of one environment; the full-data penalty is g^2 with
    # g = 2 mean((pred - y) pred) (IRM paper's closed form for squared error). Minibatches of 8 drawn with
    # replacement, as the training loop draws. Expected values (sampling with replacement, computed):
    # E[split halves] = g^2 (independent halves); E[squared] = g^2 + Var(per-window gradient) / 8.
    rng = np.random.default_rng(0)
    pred = rng.normal(1.0, 1.0, 400)
    target = pred + rng.normal(0.3, 1.0, 400)
    per_window = 2 * (pred - target) * pred
    full = per_window.mean() ** 2
    batch = 8
    expected_squared = full + per_window.var() / batch  # numpy var, ddof 0: the with-replacement variance
    draws = rng.integers(0, 400, size=(3000, batch))
    estimates = {}
    for estimator in ("split_halves", "squared"):
        penalty = build_penalty("irm", weight=1.0, estimator=estimator)
        estimates[estimator] = np.array([penalty([t(pred[d])], [t(target[d])], step=0)[1]["penalty_value"]
                                         for d in draws])
    for estimator, expected in (("split_halves", full), ("squared", expected_squared)):
        values = estimates[estimator]
        standard_error = values.std(ddof=1) / np.sqrt(len(values))
        assert abs(values.mean() - expected) < 3.5 * standard_error, (estimator, values.mean(), expected)
    squared = estimates["squared"]
    # The bias is real and detectable here: the squared estimate's mean sits many standard errors above g^2.
    assert squared.mean() - full > 5 * squared.std(ddof=1) / np.sqrt(len(squared))


# --- V-REx: Krueger et al. (2021), ICML ---------------------------------------------
def test_vrex_uses_the_population_variance_of_the_risks():
    preds, targets = constant_risk_batches([0.2, 0.5, 0.8])
    loss, logs = build_penalty("vrex", weight=10.0, rescale_heavy=False)(preds, targets, step=0)
    assert logs["penalty_value"] == pytest.approx(0.06, abs=1e-12)  # Var_pop, computed with numpy
    assert logs["penalty_value"] == pytest.approx(np.var([0.2, 0.5, 0.8]), abs=1e-12)  # numpy ddof=0
    assert logs["penalty_value"] != pytest.approx(0.09, abs=1e-3)  # NOT the sample variance (torch.var)
    assert float(loss) == pytest.approx(0.5 + 10 * 0.06, abs=1e-12)  # mean of risks + beta * Var_pop
    paper_sum_form = sum(logs[f"risk/{e}"] for e in range(3)) + logs["penalty_weight"] * logs["penalty_value"]
    assert paper_sum_form == pytest.approx(2.1, abs=1e-12)  # Krueger et al. 2021, computed: beta=10 with Var_pop -> 2.1


def test_vrex_two_environments_equals_quarter_squared_difference():
    preds, targets = constant_risk_batches([0.3, 0.7])
    _, logs = build_penalty("vrex", weight=1.0)(preds, targets, step=0)
    assert logs["penalty_value"] == pytest.approx((0.7 - 0.3) ** 2 / 4, abs=1e-12)  # Krueger et al. 2021, computed


def test_heavy_weight_divides_the_loss_by_the_weight():
    # As in the IRMv1 reference implementation [from memory]: weight > 1 -> loss / weight.
    preds, targets = constant_risk_batches([0.2, 0.5, 0.8])
    loss, logs = build_penalty("vrex", weight=10.0)(preds, targets, step=0)
    assert logs["loss_scale"] == pytest.approx(0.1)
    assert float(loss) == pytest.approx((0.5 + 10 * 0.06) / 10, abs=1e-12)
    _, light = build_penalty("vrex", weight=0.5)(preds, targets, step=0)
    assert light["loss_scale"] == 1.0


# --- Group DRO: Sagawa, Koh, Hashimoto, Liang (2020), ICLR, arXiv:1911.08731 ---------
@pytest.mark.parametrize("eta,q,loss_value", [
    (0.01, (0.332334, 0.333332, 0.334334), 0.500600),  # computed with numpy from the update rule
    (1.0, (0.239694, 0.323554, 0.436752), 0.559117),  # computed with numpy from the update rule
])
def test_groupdro_one_step(eta, q, loss_value):
    preds, targets = constant_risk_batches([0.2, 0.5, 0.8])
    loss, logs = build_penalty("groupdro", weight=1.0, eta=eta)(preds, targets, step=0)
    np.testing.assert_allclose([logs[f"q/{g}"] for g in range(3)], q, atol=1e-6)
    assert float(loss) == pytest.approx(loss_value, abs=1e-6)  # weight 1 = Sagawa et al.'s objective


def test_groupdro_state_persists_across_steps_and_resets():
    risks = [0.2, 0.5, 0.8]
    preds, targets = constant_risk_batches(risks)
    penalty = build_penalty("groupdro", weight=1.0, eta=1.0)
    penalty(preds, targets, step=0)
    _, logs = penalty(preds, targets, step=1)
    q = [logs[f"q/{g}"] for g in range(3)]
    np.testing.assert_allclose(q, torch.softmax(2 * t(risks), 0).numpy(), atol=1e-12)
    np.testing.assert_allclose(q, (0.162807, 0.296654, 0.540539), atol=1e-6)  # computed with numpy from the update rule
    penalty.reset()
    _, logs = penalty(preds, targets, step=2)
    np.testing.assert_allclose([logs[f"q/{g}"] for g in range(3)], (0.239694, 0.323554, 0.436752), atol=1e-6)


def test_groupdro_weights_stay_uniform_during_warmup():
    preds, targets = constant_risk_batches([0.2, 0.5, 0.8])
    penalty = build_penalty("groupdro", weight=1.0, warmup_steps=2, eta=1.0)
    for step in (0, 1):
        loss, logs = penalty(preds, targets, step=step)
        assert [logs[f"q/{g}"] for g in range(3)] == pytest.approx([1 / 3] * 3)
        assert float(loss) == pytest.approx(0.5)  # plain mean risk while warming up
    _, logs = penalty(preds, targets, step=2)
    np.testing.assert_allclose([logs[f"q/{g}"] for g in range(3)], (0.239694, 0.323554, 0.436752), atol=1e-6)


# --- schedule, ERM and errors ------------------------------------------------------------------------------
def test_warmup_schedule_and_optimizer_reset_switch():
    penalty = build_penalty("irm", weight=5.0, warmup_steps=10)
    assert [penalty.effective_weight(s) for s in (0, 9, 10, 500)] == [0.0, 0.0, 5.0, 5.0]
    assert [s for s in range(30) if penalty.resets_optimizer_at(s)] == [10]
    # The ERM twin with the same warm-up is reset at the same step (same treatment, pipeline.twins).
    assert [s for s in range(30) if build_penalty("erm", warmup_steps=10).resets_optimizer_at(s)] == [10]
    soft = build_penalty("vrex", weight=5.0, warmup_steps=10, warmup_weight=1.0)
    assert [soft.effective_weight(s) for s in (9, 10)] == [1.0, 5.0]
    assert not any(build_penalty("irm", weight=5.0).resets_optimizer_at(s) for s in range(30))
    assert not any(build_penalty("irm", weight=5.0, warmup_steps=10, reset_optimizer=False)
                   .resets_optimizer_at(s) for s in range(30))


def test_erm_is_the_mean_of_environment_risks_whatever_the_weight():
    preds, targets = constant_risk_batches([0.2, 0.5, 0.8])
    loss, logs = build_penalty("erm", weight=3.0, rescale_heavy=False)(preds, targets, step=0)
    assert float(loss) == pytest.approx(0.5) and logs["penalty_value"] == 0.0


def test_environment_weights_of_pooled_sampling_weight_the_risks():
    # Pooled sampling: a_e = share of the training windows, so the risk term is the pooled risk.
    preds, targets = constant_risk_batches([0.2, 0.5, 0.8])
    shares = torch.tensor([0.5, 0.3, 0.2], dtype=torch.float64)
    loss, _ = build_penalty("erm")(preds, targets, step=0, env_weights=shares)
    assert float(loss) == pytest.approx(0.5 * 0.2 + 0.3 * 0.5 + 0.2 * 0.8, abs=1e-12)
    # Group DRO with weight 1 is still exactly Sagawa et al.'s robust loss (computed with numpy from the
    # update rule, as in test_groupdro_one_step).
    loss, _ = build_penalty("groupdro", weight=1.0, eta=1.0)(preds, targets, step=0, env_weights=shares)
    assert float(loss) == pytest.approx(0.559117, abs=1e-6)
    # V-REx keeps the population variance of the risks (Krueger et al. 2021), whatever their weights.
    _, logs = build_penalty("vrex", weight=1.0)(preds, targets, step=0, env_weights=shares)
    assert logs["penalty_value"] == pytest.approx(0.06, abs=1e-12)


def test_which_runs_count_as_penalised():
    assert build_penalty("irm", weight=1.0).penalised and build_penalty("groupdro", weight=1.0).penalised
    assert not build_penalty("erm", weight=3.0).penalised  # the ERM term is 0 whatever the weight
    assert not build_penalty("vrex", weight=0.0).penalised
    assert build_penalty("vrex", weight=0.0, warmup_steps=5, warmup_weight=1.0).penalised


@pytest.mark.parametrize("kwargs,match", [
    ({"name": "coral"}, "unknown penalty 'coral'"),
    ({"name": "irm", "weight": -1.0}, "penalty.weight"),
    ({"name": "irm", "warmup_steps": -2}, "penalty.warmup_steps"),
    ({"name": "groupdro", "eta": 0.0}, "penalty.eta"),
    ({"name": "vrex", "eta": 0.1}, "unexpected keyword argument 'eta'"),
    ({"name": "irm", "irm_gradient": "finite_differences"}, "penalty.irm_gradient"),
    ({"name": "irm", "estimator": "jackknife"}, "penalty.extra.estimator"),
    ({"name": "vrex", "estimator": "squared"}, "unexpected keyword argument 'estimator'"),
])
def test_bad_penalty_settings_raise_input_error(kwargs, match):
    with pytest.raises(InputError, match=match):
        build_penalty(**kwargs)


# --- every environment at once (pipeline.penalties.BatchLayout) ------------------------------------------
def per_environment_terms(preds, targets, name, estimator="split_halves", eta=0.01):
    """Risks and penalty term environment by environment, written with numpy from the formulas above
    (IRMv1: Arjovsky et al. 2019, section 3; V-REx: Krueger et al. 2021; Group DRO: Sagawa et al. 2020)."""
    risks = np.array([np.mean((p - t) ** 2) for p, t in zip(preds, targets)])

    def gradient(p, t):  # d/dw mean((w p - t)^2) at w = 1
        return 2 * np.mean((p - t) * p)

    if name == "irm" and estimator == "squared":
        term = np.mean([gradient(p, t) ** 2 for p, t in zip(preds, targets)])
    elif name == "irm":
        term = np.mean([gradient(p[:len(p) // 2], t[:len(p) // 2]) * gradient(p[len(p) // 2:], t[len(p) // 2:])
                        for p, t in zip(preds, targets)])
    elif name == "vrex":
        term = np.var(risks)
    else:
        q = np.exp(eta * risks) / np.exp(eta * risks).sum()
        term = np.sum(q * risks) - risks.mean()
    return risks, term


@pytest.mark.parametrize("counts", [(6, 6, 6), (5, 8, 3)])  # balanced batches; pooled ones (unequal)
@pytest.mark.parametrize("name,extra", [("irm", {}), ("irm", {"irm_gradient": "autograd"}),
                                        ("irm", {"estimator": "squared"}),
                                        ("irm", {"estimator": "squared", "irm_gradient": "autograd"}),
                                        ("vrex", {}), ("groupdro", {})])
def test_all_environments_at_once_give_each_environment_its_own_formula(counts, name, extra):
    rng = np.random.default_rng(sum(counts))
    preds = [rng.normal(size=(n, 4)) for n in counts]
    targets = [p + rng.normal(0.2, 1.0, size=p.shape) for p in preds]
    risks, term = per_environment_terms(preds, targets, name, extra.get("estimator", "split_halves"))
    loss, logs = build_penalty(name, weight=1.0, **extra)([t(p) for p in preds], [t(y) for y in targets], step=0)
    np.testing.assert_allclose([logs[f"risk/{e}"] for e in range(3)], risks, rtol=1e-12)
    assert logs["penalty_value"] == pytest.approx(term, rel=1e-10, abs=1e-12)
    assert float(loss.detach()) == pytest.approx(risks.mean() + term, rel=1e-10)


@pytest.mark.parametrize("counts", [(6, 6, 6), (5, 8, 3)])
@pytest.mark.parametrize("name,extra", [("irm", {}), ("irm", {"irm_gradient": "autograd"}),
                                        ("irm", {"estimator": "squared"}), ("vrex", {}), ("groupdro", {})])
def test_all_environments_at_once_give_the_gradients_of_a_loop_over_environments(counts, name, extra):
    generator = torch.Generator().manual_seed(1)
    preds = [torch.randn(n, 3, generator=generator, dtype=torch.float64).requires_grad_() for n in counts]
    targets = [torch.randn(n, 3, generator=generator, dtype=torch.float64) for n in counts]
    loss, _ = build_penalty(name, weight=3.0, **extra)(preds, targets, step=0)
    fused = torch.autograd.grad(loss, preds)
    # the same objective written as a loop over environments (weight 3 > 1: the loss is divided by 3)
    risks = torch.stack([torch.mean((p - y) ** 2) for p, y in zip(preds, targets)])
    if name == "irm" and extra.get("estimator") == "squared":
        term = torch.mean(torch.stack([(2 * torch.mean((p - y) * p)) ** 2 for p, y in zip(preds, targets)]))
    elif name == "irm":
        halves = [(2 * torch.mean((p[:len(p) // 2] - y[:len(p) // 2]) * p[:len(p) // 2]),
                   2 * torch.mean((p[len(p) // 2:] - y[len(p) // 2:]) * p[len(p) // 2:])) for p, y in zip(preds, targets)]
        term = torch.mean(torch.stack([a * b for a, b in halves]))
    elif name == "vrex":
        term = torch.mean((risks - risks.mean()) ** 2)
    else:
        q = torch.softmax(0.01 * risks.detach(), 0)
        term = torch.sum(q * risks) - risks.mean()
    looped = torch.autograd.grad((risks.mean() + 3.0 * term) / 3.0, preds)
    for a, b in zip(fused, looped):
        torch.testing.assert_close(a, b, rtol=1e-12, atol=1e-14)


def test_balanced_batches_give_each_environment_the_risk_of_its_own_mean_bit_for_bit():
    # What keeps balanced ERM, V-REx and Group DRO fits identical to those of the loop over environments.
    from pipeline.penalties import BatchLayout

    generator = torch.Generator().manual_seed(2)
    for n_envs, per_env, horizon in ((3, 42, 24), (2, 7, 5), (4, 64, 1)):
        errors = torch.randn(n_envs * per_env, horizon, generator=generator) ** 2
        expected = torch.stack([chunk.mean() for chunk in torch.split(errors, per_env)])
        assert torch.equal(BatchLayout([per_env] * n_envs).env_means(errors), expected)
        halves = BatchLayout([per_env] * n_envs).half_means(errors)
        first, second, half = halves[:, 0], halves[:, 1], per_env // 2
        assert torch.equal(first, torch.stack([chunk[:half].mean() for chunk in torch.split(errors, per_env)]))
        assert torch.equal(second, torch.stack([chunk[half:].mean() for chunk in torch.split(errors, per_env)]))


def test_a_zero_weight_term_is_logged_but_leaves_the_loss_and_its_gradient_to_the_risks():
    generator = torch.Generator().manual_seed(3)
    preds = [torch.randn(4, 2, generator=generator, dtype=torch.float64).requires_grad_() for _ in range(3)]
    targets = [torch.randn(4, 2, generator=generator, dtype=torch.float64) for _ in range(3)]
    loss, logs = build_penalty("irm", weight=5.0, warmup_steps=3, estimator="squared")(preds, targets, step=0)
    assert logs["penalty_weight"] == 0.0 and logs["penalty_value"] > 0  # the warm-up's term is in the logs
    erm_loss, _ = build_penalty("erm")(preds, targets, step=0)
    assert torch.equal(loss, erm_loss)
    assert all(torch.equal(a, b) for a, b in zip(torch.autograd.grad(loss, preds), torch.autograd.grad(erm_loss, preds)))
