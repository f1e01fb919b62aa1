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


class BatchLayout:
    """How a batch's rows are grouped: one run of consecutive rows per environment, `counts[e]` rows long
    (the order of the sampler's environments), and the two halves of each run (IRMv1's split_halves).

    Per-group means are computed for every group at once, never in a Python loop per environment: with
    equal runs (balanced batches, the default) by one reshape, which gives each environment's mean bit for
    bit as a mean over its own rows would; with unequal runs (pooled batches) by one index_add of the row
    sums, whose rounding may differ from a per-environment mean in the last bits.
    """

    def __init__(self, counts: list[int]):
        import torch

        self.counts = [int(c) for c in counts]
        if not self.counts or min(self.counts) < 1:
            raise ValueError(f"every environment needs >= 1 row in a batch, got counts {self.counts}")
        self.n_envs = len(self.counts)
        self.equal = len(set(self.counts)) == 1
        halves = [part for count in self.counts for part in (count // 2, count - count // 2)]
        self.half_sizes = torch.tensor(halves, dtype=torch.int64)
        self.half_ids = torch.repeat_interleave(torch.arange(len(halves)), self.half_sizes)
        self.env_sizes = torch.tensor(self.counts, dtype=torch.int64)
        self.env_ids = torch.repeat_interleave(torch.arange(self.n_envs), self.env_sizes)

    @staticmethod
    def _segment_means(rows: torch.Tensor, ids: torch.Tensor, sizes: torch.Tensor) -> torch.Tensor:
        import torch

        sums = torch.zeros(len(sizes), dtype=rows.dtype, device=rows.device).index_add(0, ids, rows.sum(1))
        return sums / (sizes.to(rows.dtype) * rows.shape[1])

    def env_means(self, values: torch.Tensor) -> torch.Tensor:
        """(E,): the mean of each environment's values (rows of `values`, any trailing shape)."""
        rows = values.reshape(len(values), -1)
        if self.equal:
            return rows.reshape(self.n_envs, -1).mean(1)
        return self._segment_means(rows, self.env_ids, self.env_sizes)

    def half_means(self, values: torch.Tensor) -> torch.Tensor:
        """(E, 2): per environment, the mean over the first half of its rows and over the second half (an
        odd count gives the second half one more row)."""
        import torch

        if min(self.counts) < 2:
            raise ValueError(f"irm estimator split_halves needs >= 2 windows per environment, got {min(self.counts)}")
        rows = values.reshape(len(values), -1)
        if not self.equal:
            return self._segment_means(rows, self.half_ids, self.half_sizes).reshape(self.n_envs, 2)
        per_env, half = self.counts[0], self.counts[0] // 2
        if per_env % 2 == 0:  # both halves in one reduction
            return rows.reshape(self.n_envs, 2, -1).mean(2)
        per_env_rows = rows.reshape(self.n_envs, per_env, -1)
        return torch.stack([per_env_rows[:, :half].mean((1, 2)), per_env_rows[:, half:].mean((1, 2))], dim=1)


class StepTerms:
    """What a penalty computed for one step: the loss to backpropagate and, detached, what the training
    loop logs. Floats are made only when asked (`logs`), so a step costs no conversions."""

    def __init__(self, loss, risks, term, weight: float, loss_scale: float, extras: dict):
        self.loss, self.risks, self.term = loss, risks, term
        self.weight, self.loss_scale, self.extras = weight, loss_scale, extras

    def loss_value(self) -> float:
        return float(self.loss.detach())

    def logs(self) -> dict[str, float]:
        logs = {f"risk/{e}": r for e, r in enumerate(self.risks.tolist())}
        logs.update(penalty_value=float(self.term), penalty_weight=self.weight, loss_scale=self.loss_scale,
                    loss=self.loss_value())
        for name, values in self.extras.items():
            logs.update({f"{name}/{g}": v for g, v in enumerate(values.tolist())})
        return logs


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

    def penalty_term(self, risks: torch.Tensor, errors: torch.Tensor, preds: torch.Tensor, layout: BatchLayout,
                     weight: float, base_risk: torch.Tensor) -> tuple[torch.Tensor, dict]:
        """(P, {log name: tensor of per-group values}); errors = preds - targets, rows grouped by `layout`."""
        raise NotImplementedError

    def objective(self, preds: torch.Tensor, targets: torch.Tensor, layout: BatchLayout, step: int,
                  env_weights: torch.Tensor | None = None) -> StepTerms:
        """The loss of one batch whose rows are grouped by environment as `layout` says.
        env_weights: the a_e of the module docstring (>= 0, summing to 1); None = 1/E each."""
        import torch

        errors = preds - targets
        risks = layout.env_means(errors ** 2)
        weight = self.effective_weight(step)
        # risks.mean() rather than a uniform weighted sum keeps balanced runs bit-identical to earlier ones.
        base_risk = risks.mean() if env_weights is None else torch.sum(env_weights.to(risks.dtype) * risks)
        if weight == 0:
            # A term with weight 0 only adds 0 to the loss and its gradient: compute it for the logs, on
            # detached values, and leave it out of the graph (the loss is then the ERM twin's, bit for bit).
            term, extras = self.penalty_term(risks.detach(), errors.detach(), preds.detach(), layout, weight,
                                             base_risk.detach())
            loss = base_risk
        else:
            term, extras = self.penalty_term(risks, errors, preds, layout, weight, base_risk)
            loss = base_risk + weight * term
        loss_scale = 1.0 / weight if (self.rescale_heavy and weight > 1.0) else 1.0
        if loss_scale != 1.0:
            loss = loss * loss_scale
        return StepTerms(loss, risks.detach(), term.detach(), weight, loss_scale, extras)

    def __call__(self, preds_by_env: list[torch.Tensor], targets_by_env: list[torch.Tensor],
                 step: int, env_weights: torch.Tensor | None = None) -> tuple[torch.Tensor, dict[str, float]]:
        """(loss, logs) from one tensor of forecasts and one of targets per environment (`objective` on
        their concatenation)."""
        if len(preds_by_env) == 0 or len(preds_by_env) != len(targets_by_env):
            raise ValueError("preds_by_env and targets_by_env must be non-empty lists of equal length")
        import torch

        terms = self.objective(torch.cat(list(preds_by_env)), torch.cat(list(targets_by_env)),
                               BatchLayout([len(p) for p in preds_by_env]), step, env_weights)
        return terms.loss, terms.logs()


class ERMPenalty(Penalty):
    """No penalty: the term is 0 whatever the weight (empirical risk minimisation over pooled envs)."""

    name = "erm"

    def penalty_term(self, risks, errors, preds, layout, weight, base_risk):
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
    tests check both give the same value and the same gradients. Either way every environment's (or
    half's) gradient comes out of one computation over the whole batch (BatchLayout), one autograd.grad
    call for "autograd"; `irm_gradient_closed_form` and `irm_gradient_autograd` define it for one.
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

    def _group_means(self, values, layout: BatchLayout):
        """Per group (environment, or its two halves for split_halves) the mean of `values`, as one tensor."""
        if self.estimator == "squared":
            return layout.env_means(values)
        return layout.half_means(values)

    def gradients(self, errors, preds, layout: BatchLayout):
        """d/dw of each group's risk R(w * f) at w = 1: (E,) for "squared", (E, 2) for split halves."""
        import torch

        if self.irm_gradient == "closed_form":  # 2 mean((f - y) f), as irm_gradient_closed_form
            return 2.0 * self._group_means(errors * preds, layout)
        # One dummy scale per group, and one autograd.grad call: each group's risk depends on its own scale
        # only, so the gradient of their sum with respect to the scales is every group's gradient.
        split = self.estimator == "split_halves"
        scale = torch.ones(2 * layout.n_envs if split else layout.n_envs, dtype=preds.dtype, device=preds.device,
                           requires_grad=True)
        with torch.enable_grad():  # also for a detached warm-up term (the logs)
            row_scale = scale[layout.half_ids if split else layout.env_ids].reshape(-1, *([1] * (preds.dim() - 1)))
            # w f - y written as (f - y) + (w - 1) f: the errors as they are, exactly, at w = 1
            scaled_errors = errors + (row_scale - 1.0) * preds
            (grad,) = torch.autograd.grad(self._group_means(scaled_errors ** 2, layout).sum(), scale,
                                          create_graph=True)
        return grad.reshape(layout.n_envs, 2) if split else grad

    def penalty_term(self, risks, errors, preds, layout, weight, base_risk):
        import torch

        gradients = self.gradients(errors, preds, layout)
        if self.estimator == "squared":
            return torch.mean(gradients ** 2), {}
        # Halves along the window axis; an odd count gives the second half one more window (still independent).
        return torch.mean(gradients[:, 0] * gradients[:, 1]), {}


class VRExPenalty(Penalty):
    """V-REx (Krueger et al. 2021): P = variance of the per-environment risks.

    Convention: POPULATION variance (divide by E, numpy's default ddof=0), not torch.var's default
    sample variance; for two environments Var_pop = (R1 - R2)^2 / 4. With a single environment P = 0.
    """

    name = "vrex"

    def penalty_term(self, risks, errors, preds, layout, weight, base_risk):
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

    def penalty_term(self, risks, errors, preds, layout, weight, base_risk):
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
        return robust - base_risk, {"q": self.q_}


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
