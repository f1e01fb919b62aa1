"""Training loop shared by every gradient-trained model family; reads top to bottom.

Reads in-memory window sets (any object with X (n, L, F) float32, y (n, H) float32, env (n,) int64,
env_names); writes nothing (returns the history, snapshots and timings). Obeys the `fit` config
group, i.e. the fields of `FitConfig`, plus the model seed and a penalty from pipeline.penalties.

What it does, in order:
1. fork the global torch RNG and seed it (so weight init and dropout are reproducible and the caller's
   RNG is untouched), set torch threads, make a dedicated torch.Generator for batch sampling;
2. every step draws a batch as `fit.sampling` says (pipeline.sampling: environment-balanced, or pooled
   with environment weights in the loss), runs one forward pass, asks the penalty for the loss of the
   whole batch (its rows grouped by environment: pipeline.penalties.BatchLayout), clips the gradient norm
   and takes one Adam step; the optimizer is rebuilt when the penalty's warm-up ends (for ERM runs with
   the same warm-up too: pipeline.twins). Each step reads only its loss as a float (to stop on a
   non-finite one); its other logged values stay tensors until the next evaluation turns them into
   floats at once;
3. every `eval_every` steps (and at the last step) computes the MSE on every validation set, overall and
   per environment, and stores a history entry. Only AFTER the warm-up (step > penalty.warmup_steps) does
   it store a snapshot and count towards early stopping: a warm-up snapshot was trained without the
   penalty, i.e. it is the ERM twin's model bit for bit, and must not be what a penalised run reports;
   early stopping stops when `val/source/all` has not improved for `patience` such evaluations;
4. a non-finite loss stops the fit (stop_reason "non_finite_loss"); the state at that step is still
   evaluated and snapshotted, so every fit leaves at least one snapshot.
A penalised run (pipeline.penalties.Penalty.penalised) with fewer than two training environments is
refused: its penalty would compare nothing (ERM in disguise).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch

from pipeline.errors import InputError
from pipeline.fit_config import FitConfig
from pipeline.penalties import BatchLayout, Penalty, StepTerms, build_penalty
from pipeline.sampling import EnvironmentBalancedSampler, make_sampler  # noqa: F401 (re-exported)
from pipeline.window_check import WindowSetLike, check_window_set

# Windows per forward pass at evaluation/prediction. Bounds memory, not results (the forecasts are the same
# bit for bit at any size); 512 keeps activations in cache: 2-4x faster than 4096 for the recurrent and
# attention families (bench/trainer_vs_bare_torch.py).
EVAL_CHUNK = 512
EARLY_STOP_SET = "source"  # validation set whose overall MSE drives early stopping and best_step


@dataclass
class TrainResult:
    history: list[dict[str, float]]  # one entry per evaluation
    snapshots: dict[int, dict[str, torch.Tensor]]  # step -> copy of the network's state_dict
    best_step: int | None  # step with the lowest val/source/all (earliest on ties); None without it
    final_step: int  # number of optimizer steps taken
    stop_reason: str  # "max_steps", "early_stopping" or "non_finite_loss"
    fit_seconds: float
    train_env_names: list = field(default_factory=list)
    eval_seconds: float = 0.0  # part of fit_seconds spent evaluating the validation sets


def predict_network(network: torch.nn.Module, X: np.ndarray) -> np.ndarray:
    """Forward pass in chunks, eval mode, no gradients; returns float32 (n, H)."""
    network.eval()
    outputs = []
    with torch.no_grad():
        X_t = torch.from_numpy(np.ascontiguousarray(X, dtype=np.float32))
        for start in range(0, len(X_t), EVAL_CHUNK):
            outputs.append(network(X_t[start:start + EVAL_CHUNK]))
    if not outputs:
        return np.zeros((0, 0), dtype=np.float32)
    return torch.cat(outputs).numpy()


def evaluate(network: torch.nn.Module, val: dict[str, Any]) -> dict[str, float]:
    """MSE per validation set, overall (`val/<set>/all`) and per environment (`val/<set>/<env>`)."""
    return validation_scores({name: predict_network(network, windows.X) for name, windows in val.items()
                              if len(windows.y)}, val)


def validation_scores(predictions: dict[str, np.ndarray], val: dict[str, Any]) -> dict[str, float]:
    """The scores of `evaluate` from forecasts already made, one array per non-empty validation set."""
    results = {}
    for set_name, windows in val.items():
        if len(windows.y) == 0:
            continue  # an empty set has no risk; its keys are absent rather than NaN
        squared = (predictions[set_name] - windows.y) ** 2
        results[f"val/{set_name}/all"] = float(squared.mean())
        for e in np.unique(windows.env):
            results[f"val/{set_name}/{windows.env_names[e]}"] = float(squared[windows.env == e].mean())
    return results


def make_optimizer(network: torch.nn.Module, cfg: FitConfig) -> torch.optim.Optimizer:
    try:  # fused Adam is as fast or faster on CPU; older builds or odd dtypes may refuse it
        return torch.optim.Adam(network.parameters(), lr=cfg.lr, weight_decay=cfg.weight_decay, fused=True)
    except (RuntimeError, TypeError, ValueError):
        return torch.optim.Adam(network.parameters(), lr=cfg.lr, weight_decay=cfg.weight_decay)


@torch.no_grad()
def clip_gradient_norms(parameter_groups: list[list[torch.Tensor]], max_norm: float) -> None:
    """torch.nn.utils.clip_grad_norm_(group, max_norm) on each group (one network's parameters), with the
    same operations in the same order, hence the same gradients bit for bit; but one norm call over every
    group's gradients and none of torch's per-call grouping of tensors by device and dtype, which costs
    about as much as the clipping itself on the small networks and is paid once per seed of an ensemble."""
    grads = [[p.grad for p in group if p.grad is not None] for group in parameter_groups]
    norms = torch._foreach_norm([g for group in grads for g in group], 2.0)  # what clip_grad_norm_ calls
    start = 0
    for group in grads:
        if not group:
            continue
        total_norm = torch.linalg.vector_norm(torch.stack(norms[start:start + len(group)]), 2.0)
        start += len(group)
        torch._foreach_mul_(group, torch.clamp(max_norm / (total_norm + 1e-6), max=1.0))


def copy_state(network: torch.nn.Module) -> dict[str, torch.Tensor]:
    return {k: v.detach().clone() for k, v in network.state_dict().items()}


def _check_batches(sampler, penalty: Penalty, env_names: list, cfg: FitConfig) -> None:
    """One-line InputErrors for batches on which the penalty is undefined or compares nothing."""
    present = [env_names[e] for e in sampler.env_ids]
    if penalty.penalised and len(present) < 2:
        raise InputError(f"penalty {penalty.name} needs >= 2 training environments, got {len(present)} "
                         f"({', '.join(map(str, present))}): with one it is ERM in disguise", field="train.env")
    if min(sampler.counts) < penalty.min_windows_per_env:
        raise InputError(f"{cfg.batch_size} windows over {len(present)} environments leave "
                         f"{min(sampler.counts)} per environment; penalty {penalty.name} needs "
                         f"{penalty.min_windows_per_env}", field="fit.batch_size")


class FitProgress:
    """One fit's bookkeeping, the same for a single network and for every member of an ensemble
    (pipeline.ensemble): training values between evaluations, the history, snapshots after the warm-up,
    early stopping on `val/source/all`, and the time spent evaluating."""

    def __init__(self, env_names: list, penalty: Penalty, cfg: FitConfig):
        self.env_names, self.penalty, self.cfg = env_names, penalty, cfg
        self.risk_keys = [f"train/risk/{name}" for name in env_names]  # history key of each env's training risk
        self.since_eval: list[tuple] = []  # (loss, loss scale, term, risks) of each step since the last evaluation
        self.history: list[dict[str, float]] = []
        self.snapshots: dict[int, dict[str, torch.Tensor]] = {}
        self.best_value, self.best_step, self.evals_without_gain = math.inf, None, 0
        self.stop_reason: str | None = None  # set when the fit must stop before fit.max_steps
        self.eval_seconds = 0.0

    def record_step(self, terms: StepTerms) -> None:
        """The penalty's terms of one optimizer step, detached (the step's graph is not kept); made into
        floats only at the next evaluation."""
        self.since_eval.append((terms.loss.detach(), terms.loss_scale, terms.term, terms.risks))

    def _training_means(self) -> dict[str, float]:
        """The mean of each training value over the steps since the last evaluation (none without a step):
        three tensor conversions per evaluation instead of a float per value and step."""
        steps = self.since_eval
        if not steps:
            return {}
        # Unscaled objective (loss / loss_scale) so histories with and without rescaling compare.
        losses, scales, terms, risks = zip(*steps)
        values = {"train_loss": [loss / scale for loss, scale in zip(torch.stack(losses).tolist(), scales)],
                  "penalty_value": torch.stack(terms).tolist()}
        risks = torch.stack(risks).T.tolist()
        values.update(zip(self.risk_keys, risks))
        return {key: float(np.mean(column)) for key, column in values.items()}

    def evaluation_due(self, step: int) -> bool:
        return step % self.cfg.eval_every == 0 or step == self.cfg.max_steps

    def add_evaluation(self, step: int, weight: float, scores: dict[str, float], seconds: float, state,
                       final: bool = False) -> None:
        """A history entry from the validation `scores` at `step`; `weight`: the penalty weight of the last
        step taken (of the next one for a `final` entry); `state()` gives the weights to snapshot.
        A `final` evaluation (the fit stopped between evaluations) is always snapshotted, never counted."""
        entry = {"step": step, "penalty_weight": weight, **self._training_means(), **scores}
        self.history.append(entry)
        self.eval_seconds += seconds
        self.since_eval = []
        if not final and step <= self.penalty.warmup_steps:
            return  # a warm-up model: on the curve, never selected, not counted for stopping
        self.snapshots[step] = state()
        criterion = entry.get(f"val/{EARLY_STOP_SET}/all")
        if final or criterion is None:
            return
        if criterion < self.best_value:
            self.best_value, self.best_step, self.evals_without_gain = criterion, step, 0
        else:
            self.evals_without_gain += 1
            if self.evals_without_gain >= self.cfg.patience:
                self.stop_reason = "early_stopping"

    def result(self, final_step: int, fit_seconds: float) -> TrainResult:
        return TrainResult(history=self.history, snapshots=self.snapshots, best_step=self.best_step,
                           final_step=final_step, stop_reason=self.stop_reason or "max_steps",
                           fit_seconds=fit_seconds, train_env_names=self.env_names,
                           eval_seconds=self.eval_seconds)


def timed_evaluation(network: torch.nn.Module, val: dict[str, Any]) -> tuple[dict[str, float], float]:
    started = time.perf_counter()
    scores = evaluate(network, val)
    return scores, time.perf_counter() - started


def prepare_fit(train: WindowSetLike, val: dict | None, penalty: Penalty | None,
                fit_config: FitConfig | None) -> tuple[FitConfig, Penalty, dict]:
    """(fit config, penalty, validation sets) with their defaults, checked: one-line InputErrors for window
    sets and a schedule that no fit can use. Sets torch's threads."""
    cfg = fit_config if fit_config is not None else FitConfig()
    penalty = penalty if penalty is not None else build_penalty("erm")
    val = dict(val or {})
    check_window_set(train, "train")
    if len(train.y) == 0:
        raise InputError("no training windows", field="train")
    for set_name, windows in val.items():
        check_window_set(windows, f"val/{set_name}")
    if penalty.warmup_steps >= cfg.max_steps:
        raise InputError(f"{penalty.warmup_steps} leaves no step after the warm-up to select from "
                         f"(fit.max_steps {cfg.max_steps})", field="penalty.warmup_steps")
    torch.set_num_threads(cfg.threads)
    return cfg, penalty, val


def training_tensors(train: WindowSetLike) -> tuple[torch.Tensor, torch.Tensor]:
    return (torch.from_numpy(np.ascontiguousarray(train.X, dtype=np.float32)),
            torch.from_numpy(np.ascontiguousarray(train.y, dtype=np.float32)))


def train_network(build_network, train: WindowSetLike, val: dict[str, WindowSetLike] | None = None,
                  penalty: Penalty | None = None, fit_config: FitConfig | None = None,
                  seed: int = 0) -> tuple[torch.nn.Module, TrainResult]:
    """Build a network with `build_network()` under the seed and train it; returns (network, result).

    The returned network holds the weights of the LAST step; pick another with result.snapshots.
    """
    started = time.perf_counter()
    cfg, penalty, val = prepare_fit(train, val, penalty, fit_config)
    penalty.reset()

    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)  # weight init and dropout draw from the (forked) global generator
        network = build_network()
        sampler_generator = torch.Generator().manual_seed(seed)
        sampler = make_sampler(cfg.sampling, np.asarray(train.env), cfg.batch_size, sampler_generator,
                               penalty.min_windows_per_env)
        _check_batches(sampler, penalty, train.env_names, cfg)
        X, y = training_tensors(train)
        optimizer = make_optimizer(network, cfg)
        progress = FitProgress([train.env_names[e] for e in sampler.env_ids], penalty, cfg)
        layout = BatchLayout(sampler.counts)  # the batch's rows, environment by environment
        parameters = list(network.parameters())
        step = 0

        network.train()
        while step < cfg.max_steps:
            if penalty.resets_optimizer_at(step):
                optimizer = make_optimizer(network, cfg)
            # one gather of inputs and one of targets per step; index_select copies whole rows, several times
            # faster than advanced indexing (X[index]) on CPU, same values
            index = torch.cat(sampler.next_batch())
            terms = penalty.objective(network(X.index_select(0, index)), y.index_select(0, index), layout, step,
                                      env_weights=sampler.risk_weights)
            if not math.isfinite(terms.loss_value()):
                progress.stop_reason = "non_finite_loss"
                break
            optimizer.zero_grad(set_to_none=True)
            terms.loss.backward()
            if cfg.grad_clip > 0:
                clip_gradient_norms([parameters], cfg.grad_clip)
            optimizer.step()
            step += 1
            progress.record_step(terms)
            if progress.evaluation_due(step):
                progress.add_evaluation(step, terms.weight, *timed_evaluation(network, val),
                                        lambda: copy_state(network))
                network.train()  # the evaluation left it in eval mode
                if progress.stop_reason:
                    break

        if step not in progress.snapshots:  # stopped on a non-finite loss between evaluations: keep the state
            progress.add_evaluation(step, penalty.effective_weight(step), *timed_evaluation(network, val),
                                    lambda: copy_state(network), final=True)

    return network, progress.result(step, time.perf_counter() - started)
