"""The introductory linear example of IRM: Arjovsky, Bottou, Gulrajani, Lopez-Paz (2019), "Invariant Risk
Minimization", arXiv:1907.02893 (worked values computed from its closed form).

Environments: X1 ~ N(0, s2), Y = X1 + N(0, s2), X2 = Y + N(0, 1), with s2 in {0.1, 1}. Y depends on X1
the same way everywhere (coefficient 1); X2 is a spurious effect of Y whose usefulness depends on s2.
"""

import numpy as np
import pytest
import torch

from pipeline.penalties import build_penalty

torch.set_num_threads(1)


def make_environment(s2: float, n: int, generator: torch.Generator, spurious_var: float = 1.0):
    x1 = torch.randn(n, generator=generator) * s2 ** 0.5
    y = x1 + torch.randn(n, generator=generator) * s2 ** 0.5
    x2 = y + torch.randn(n, generator=generator) * spurious_var ** 0.5
    return torch.stack([x1, x2], dim=1), y


def least_squares(X: torch.Tensor, y: torch.Tensor) -> np.ndarray:
    """No intercept: every variable has mean 0 in this example."""
    return np.linalg.lstsq(X.double().numpy(), y.double().numpy(), rcond=None)[0]


def test_pooled_least_squares_matches_the_closed_form():
    generator = torch.Generator().manual_seed(0)
    environments = [make_environment(s2, 100_000, generator) for s2 in (0.1, 1.0)]
    X, y = torch.cat([e[0] for e in environments]), torch.cat([e[1] for e in environments])
    coef = least_squares(X, y)
    # computed from the IRM paper's closed form: pooled ERM = (1/(m+1), m/(m+1)) with m = mean(s2) = 0.55.
    # atol 0.02 for n ~ 1e5 (chosen here); the OLS standard errors here are below 0.005
    # (asserted below), so the tolerance is more than four standard errors.
    residual = (y.double() - X.double() @ torch.from_numpy(coef)).numpy()
    covariance = residual.var() * np.linalg.inv(X.double().numpy().T @ X.double().numpy())
    assert np.sqrt(np.diag(covariance)).max() < 0.005
    np.testing.assert_allclose(coef, [0.645161, 0.354839], atol=0.02)
    # One environment alone: (1/(s2+1), s2/(s2+1)); s2 = 1 -> (0.5, 0.5) (computed from the IRM paper's closed form).
    np.testing.assert_allclose(least_squares(*environments[1]), [0.5, 0.5], atol=0.02)


def train_with_irm(environments, steps=1000, lr=0.05) -> np.ndarray:
    """Full-batch Adam on y_hat = b1 x1 + b2 x2 with OUR IRMv1 penalty object.

    ERM warm-up first (weight 0): from b = 0 the IRM penalty is already 0 (y_hat = 0 makes every
    environment's gradient vanish), so a heavy penalty from the start freezes the model near 0. The
    optimizer is rebuilt where the penalty asks for it, as the training loop does.
    """
    penalty = build_penalty("irm", weight=1e4, warmup_steps=200)
    coef = torch.zeros(2, requires_grad=True)
    optimizer = torch.optim.Adam([coef], lr=lr)
    for step in range(steps):
        if penalty.resets_optimizer_at(step):
            optimizer = torch.optim.Adam([coef], lr=lr)
        loss, _ = penalty([X @ coef for X, _ in environments], [y for _, y in environments], step)
        optimizer.zero_grad()
        loss.backward()
        optimizer.step()
    return coef.detach().double().numpy()


def test_irm_finds_the_invariant_coefficients_and_wins_when_the_spurious_mechanism_changes():
    generator = torch.Generator().manual_seed(1)
    environments = [make_environment(s2, 20_000, generator) for s2 in (0.1, 1.0)]
    irm_coef = train_with_irm(environments)
    # Invariant solution (1, 0). At n = 2e4 per environment the sample minimiser of the penalty sits a
    # few hundredths from it (b1 0.98-1.01, |b2| <= 0.04 over seeds 0-4 in our trials), hence 0.1.
    assert abs(irm_coef[1]) < 0.1 and abs(irm_coef[0] - 1.0) < 0.1

    X_pooled = torch.cat([e[0] for e in environments])
    y_pooled = torch.cat([e[1] for e in environments])
    erm_coef = least_squares(X_pooled, y_pooled)
    assert erm_coef[1] > 0.3  # pooled ERM leans on the spurious X2 (IRM paper, introductory example: 0.354839)

    # Test environment: s2 = 1 but X2 = Y + N(0, 100). Population risks (computed from the IRM paper's closed form):
    # pooled ERM 13.007, invariant model 1 (= the noise variance of Y given X1).
    X_test, y_test = make_environment(1.0, 20_000, generator, spurious_var=100.0)
    X_test, y_test = X_test.double().numpy(), y_test.double().numpy()
    erm_mse = np.mean((X_test @ erm_coef - y_test) ** 2)
    irm_mse = np.mean((X_test @ irm_coef - y_test) ** 2)
    assert erm_mse == pytest.approx(13.007, rel=0.1)
    assert irm_mse < 2.0 and irm_mse < erm_mse
