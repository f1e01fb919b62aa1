"""Invariance penalties: ERM, IRMv1, V-REx and Group DRO as one callable interface.

Reads nothing and writes nothing: pure torch, imported inside the functions that compute, so that config
validation on the DAG-planning path builds a penalty (checking its settings) without loading torch.
Obeys the `penalty` config group: `name`, `weight`, `warmup_steps` and the per-penalty extras
(`warmup_weight`, `rescale_heavy`, `reset_optimizer`, and `eta` for groupdro, `estimator` and
`irm_gradient` for irm).

Objective convention (one for every penalty, so weights are comparable between them):

    loss = sum_e a_e R_e + w(step) * P

R_e is the mean squared error of environment e (over all windows and horizon steps of that environment
in the batch); P is the penalty term; w(step) is the effective weight; a_e is the weight of environment
e's risk, set by the training loop's sampling (`fit.sampling`): 1/E with environment-balanced batches
(the MEAN over environments; the default), the environment's share of the training windows with pooled
ones (the risk term then estimates the pooled risk, as ERM on pooled data does). We take the mean, not
the sum written in the papers: the IRMv1 authors' released code averages too [from memory], and the
mean keeps the loss scale independent of the number of environments. A paper's sum-form objective is
recovered from the logs as sum(risk/e) + w * penalty_value.

Warm-up: w(step) = `warmup_weight` (default 0, i.e. plain ERM) for step < warmup_steps, then `weight`.
When w > 1 the whole loss is divided by w, as in the IRMv1 reference implementation [from memory], so that
gradient magnitudes stay comparable to ERM; this is on by default (`rescale_heavy=True`). The training loop
asks `resets_optimizer_at(step)` and builds a fresh optimizer at the end of the warm-up, because Adam's
moment estimates from the ERM phase do not fit the sudden jump in gradient scale (same reference, [from
memory]). The reset, like the selection window after the warm-up (pipeline.train_loop), depends on the
schedule only, never on the weight: an ERM run with the same `warmup_steps` gets the same treatment, which
makes it the penalised run's twin (pipeline.twins checks the pairing when the DAG is planned).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from pipeline.errors import InputError

if TYPE_CHECKING:
    import torch

PENALTY_NAMES = ("erm", "irm", "vrex", "groupdro")
IRM_ESTIMATORS = ("split_halves", "squared")  # penalty.extra.estimator of irm; the first is the default


def irm_gradient_closed_form(pred: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
    """d/dw mean((w * pred - target)^2) at w = 1, i.e. 2 * mean((pred - target) * pred).

    Squared error only; differentiable w.r.t. `pred` (the penalty backpropagates through it).
    """
    import torch

    return 2.0 * torch.mean((pred - target) * pred)


def irm_gradient_autograd(pred: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
    """Same quantity as `irm_gradient_closed_form`, through a dummy scale w = 1 and autograd.

    This is the form given by Arjovsky et al. (2019) for any loss; `create_graph=True` keeps it
    differentiable so the squared gradient can itself be minimised.
    """
    import torch

    scale = torch.ones((), dtype=pred.dtype, device=pred.device, requires_grad=True)
    risk = torch.mean((pred * scale - target) ** 2)
    (grad,) = torch.autograd.grad(risk, scale, create_graph=True)
    return grad


class Penalty:
    """Base class: the weight schedule, the rescaling and the logs; subclasses supply the term P."""

    name = "base"

    def __init__(self, weight: float = 0.0, warmup_steps: int = 0, warmup_weight: float = 0.0,
                 rescale_heavy: bool = True, reset_optimizer: bool = True):
        if not math.isfinite(weight) or weight < 0:
            raise InputError(f"must be a finite number >= 0, got {weight!r}", field="penalty.weight")
        if int(warmup_steps) != warmup_steps or warmup_steps < 0:
            raise InputError(f"must be an integer >= 0, got {warmup_steps!r}",
                             field="penalty.warmup_steps")
        if not math.isfinite(warmup_weight) or warmup_weight < 0:
            raise InputError(f"must be a finite number >= 0, got {warmup_weight!r}",
                             field="penalty.warmup_weight")
        self.weight = float(weight)
        self.warmup_steps = int(warmup_steps)
        self.warmup_weight = float(warmup_weight)
        self.rescale_heavy = bool(rescale_heavy)
        self.reset_optimizer = bool(reset_optimizer)

    # Fewest windows of one environment a batch must hold for the term to be defined.
    min_windows_per_env = 1

    @property
    def penalised(self) -> bool:
        """True when the term can act: a penalty other than ERM with a weight above 0 at some step. Such a
        run needs two or more training environments, otherwise it is ERM in disguise."""
        return self.name != "erm" and max(self.weight, self.warmup_weight) > 0

    def effective_weight(self, step: int) -> float:
        return self.warmup_weight if step < self.warmup_steps else self.weight

    def resets_optimizer_at(self, step: int) -> bool:
        """True at the one step where the warm-up ends, whatever the weights: the ERM twin of a penalised
        run, given the same `warmup_steps`, has its optimizer rebuilt at the same step."""
        return self.reset_optimizer and self.warmup_steps > 0 and step == self.warmup_steps

    def reset(self) -> None:
        """Forget any state carried between steps (called by the training loop at the start of a fit)."""

    def penalty_term(self, risks: torch.Tensor, preds: list[torch.Tensor], targets: list[torch.Tensor],
                     weight: float, base_risk: torch.Tensor) -> tuple[torch.Tensor, dict]:
        raise NotImplementedError

    def __call__(self, preds_by_env: list[torch.Tensor], targets_by_env: list[torch.Tensor],
                 step: int, env_weights: torch.Tensor | None = None) -> tuple[torch.Tensor, dict[str, float]]:
        """env_weights: the a_e of the module docstring (>= 0, summing to 1); None = 1/E each."""
        if len(preds_by_env) == 0 or len(preds_by_env) != len(targets_by_env):
            raise ValueError("preds_by_env and targets_by_env must be non-empty lists of equal length")
        import torch

        risks = torch.stack([torch.mean((p - t) ** 2) for p, t in zip(preds_by_env, targets_by_env)])
        weight = self.effective_weight(step)
        # risks.mean() rather than a uniform weighted sum keeps balanced runs bit-identical to earlier ones.
        base_risk = risks.mean() if env_weights is None else torch.sum(env_weights.to(risks.dtype) * risks)
        term, extra_logs = self.penalty_term(risks, preds_by_env, targets_by_env, weight, base_risk)
        loss = base_risk + weight * term
        loss_scale = 1.0 / weight if (self.rescale_heavy and weight > 1.0) else 1.0
        loss = loss * loss_scale
        logs = {f"risk/{e}": float(r) for e, r in enumerate(risks.detach())}
        logs.update(penalty_value=float(term.detach()), penalty_weight=weight,
                    loss_scale=loss_scale, loss=float(loss.detach()), **extra_logs)
        return loss, logs


class ERMPenalty(Penalty):
    """No penalty: the term is 0 whatever the weight (empirical risk minimisation over pooled envs)."""

    name = "erm"

    def penalty_term(self, risks, preds, targets, weight, base_risk):
        import torch

        return torch.zeros((), dtype=risks.dtype, device=risks.device), {}


class IRMv1Penalty(Penalty):
    """IRMv1 (Arjovsky, Bottou, Gulrajani, Lopez-Paz 2019): P = mean_e (d/dw R_e(w * f) at w=1)^2.

    `estimator` says how the square of environment e's gradient g_e is estimated from its windows in the
    batch:
    - "split_halves" (default): g_e on the first half of the windows times g_e on the second half. The
      halves are independent draws, so the product's expectation is the square of the full-data gradient:
      unbiased, the minibatch estimate the IRMv1 paper gives (arXiv:1907.02893, section 3). One product
      can be negative; its mean over batches is the square. Needs >= 2 windows per environment.
    - "squared": the square of the batch gradient. Its expectation is g_e^2 plus the variance of the batch
      gradient, i.e. biased upwards by the sampling noise, more so the smaller the batch.
    `irm_gradient` = "closed_form" (default; squared error only, a little cheaper) or "autograd";
    tests check both give the same value and the same gradients.
    """

    name = "irm"

    def __init__(self, *args, estimator: str = IRM_ESTIMATORS[0], irm_gradient: str = "closed_form", **kwargs):
        super().__init__(*args, **kwargs)
        if irm_gradient not in ("closed_form", "autograd"):
            raise InputError(f"must be 'closed_form' or 'autograd', got {irm_gradient!r}",
                             field="penalty.irm_gradient")
        if estimator not in IRM_ESTIMATORS:
            raise InputError(f"must be one of {', '.join(IRM_ESTIMATORS)}, got {estimator!r}",
                             field="penalty.extra.estimator")
        self.irm_gradient = irm_gradient
        self.estimator = estimator
        self.min_windows_per_env = 2 if estimator == "split_halves" else 1

    def squared_gradient(self, pred: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
        """The estimate of one environment's squared gradient (see the class docstring)."""
        gradient_of = irm_gradient_closed_form if self.irm_gradient == "closed_form" else irm_gradient_autograd
        if self.estimator == "squared":
            return gradient_of(pred, target) ** 2
        half = len(pred) // 2
        if half == 0:
            raise ValueError(f"irm estimator split_halves needs >= 2 windows per environment, got {len(pred)}")
        # Halves along the window axis; an odd count gives the second half one more window (still independent).
        return gradient_of(pred[:half], target[:half]) * gradient_of(pred[half:], target[half:])

    def penalty_term(self, risks, preds, targets, weight, base_risk):
        import torch

        return torch.mean(torch.stack([self.squared_gradient(p, t) for p, t in zip(preds, targets)])), {}


class VRExPenalty(Penalty):
    """V-REx (Krueger et al. 2021): P = variance of the per-environment risks.

    Convention: POPULATION variance (divide by E, numpy's default ddof=0), not torch.var's default
    sample variance; for two environments Var_pop = (R1 - R2)^2 / 4. With a single environment P = 0.
    """

    name = "vrex"

    def penalty_term(self, risks, preds, targets, weight, base_risk):
        import torch

        return torch.mean((risks - risks.mean()) ** 2), {}


class GroupDROPenalty(Penalty):
    """Group DRO (Sagawa, Koh, Hashimoto, Liang 2020), online exponentiated-gradient group weights.

    q starts uniform; each step q_g <- q_g * exp(eta * R_g) (R detached), renormalised; the robust loss
    is sum_g q_g R_g with the updated q. To fit the common objective the term is the robust excess
    P = sum_g q_g R_g - sum_g a_g R_g (a_g: the sampling's environment weights, 1/G when balanced), so
    weight = 1 gives exactly Sagawa et al.'s loss, weight = 0 gives ERM, and values in between interpolate. q is updated only while the effective weight is > 0, so
    it starts uniform when a warm-up ends. q persists across steps; `reset()` makes it uniform again.
    The number of groups is fixed by the first call after a reset.
    """

    name = "groupdro"

    def __init__(self, *args, eta: float = 0.01, **kwargs):
        super().__init__(*args, **kwargs)
        if not math.isfinite(eta) or eta <= 0:
            raise InputError(f"must be a finite number > 0, got {eta!r}", field="penalty.eta")
        self.eta = float(eta)
        self.q_: torch.Tensor | None = None

    def reset(self) -> None:
        self.q_ = None

    def penalty_term(self, risks, preds, targets, weight, base_risk):
        import torch

        n_groups = risks.shape[0]
        if self.q_ is None:
            self.q_ = torch.full((n_groups,), 1.0 / n_groups, dtype=risks.dtype, device=risks.device)
        if self.q_.shape[0] != n_groups:
            raise ValueError(f"groupdro was started with {self.q_.shape[0]} groups, got {n_groups}")
        if weight > 0:
            # Multiplicative update in log space: same values, no overflow when eta * R is large.
            log_q = torch.log(self.q_) + self.eta * risks.detach()
            self.q_ = torch.softmax(log_q, dim=0)
        robust = torch.sum(self.q_ * risks)
        logs = {f"q/{g}": float(v) for g, v in enumerate(self.q_)}
        return robust - base_risk, logs


_PENALTY_CLASSES = {cls.name: cls for cls in (ERMPenalty, IRMv1Penalty, VRExPenalty, GroupDROPenalty)}


def build_penalty(name: str, weight: float = 0.0, warmup_steps: int = 0, **extra) -> Penalty:
    """Penalty by name (erm, irm, vrex, groupdro); unknown name or option -> InputError.

    extra: warmup_weight (0.0), rescale_heavy (True), reset_optimizer (True); irm: estimator
    ("split_halves"), irm_gradient ("closed_form"); groupdro: eta (0.01). Note groupdro needs weight=1
    for Sagawa et al.'s objective.
    """
    if name not in _PENALTY_CLASSES:
        raise InputError(f"unknown penalty {name!r} (known: {', '.join(PENALTY_NAMES)})", field="penalty.name")
    try:
        return _PENALTY_CLASSES[name](weight=weight, warmup_steps=warmup_steps, **extra)
    except TypeError as exc:  # an unknown keyword: name it in one line
        raise InputError(f"penalty {name!r}: {exc}", field="penalty") from None
