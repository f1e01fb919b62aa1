"""Training loop shared by every gradient-trained model family; reads top to bottom.

Reads in-memory window sets (any object with X (n, L, F) float32, y (n, H) float32, env (n,) int64,
env_names); writes nothing (returns the history, snapshots and timings). Obeys the `fit` config
group, i.e. the fields of `FitConfig`, plus the model seed and a penalty from pipeline.penalties.

What it does, in order:
1. fork the global torch RNG and seed it (so weight init and dropout are reproducible and the caller's
   RNG is untouched), set torch threads, make a dedicated torch.Generator for batch sampling;
2. every step draws a batch as `fit.sampling` says (pipeline.sampling: environment-balanced, or pooled
   with environment weights in the loss), runs one forward pass, splits predictions by environment, asks
   the penalty for the loss, clips the gradient norm and takes one Adam step; the optimizer is rebuilt
   when the penalty's warm-up ends (for ERM runs with the same warm-up too: pipeline.twins);
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
from pipeline.penalties import Penalty, build_penalty
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
    results = {}
    for set_name, windows in val.items():
        if len(windows.y) == 0:
            continue  # an empty set has no risk; its keys are absent rather than NaN
        squared = (predict_network(network, windows.X) - windows.y) ** 2
        results[f"val/{set_name}/all"] = float(squared.mean())
        for e in np.unique(windows.env):
            results[f"val/{set_name}/{windows.env_names[e]}"] = float(squared[windows.env == e].mean())
    return results


def make_optimizer(network: torch.nn.Module, cfg: FitConfig) -> torch.optim.Optimizer:
    try:  # fused Adam is as fast or faster on CPU; older builds or odd dtypes may refuse it
        return torch.optim.Adam(network.parameters(), lr=cfg.lr, weight_decay=cfg.weight_decay, fused=True)
    except (RuntimeError, TypeError, ValueError):
        return torch.optim.Adam(network.parameters(), lr=cfg.lr, weight_decay=cfg.weight_decay)


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


def _empty_training_logs(risk_keys: dict[str, str]) -> dict[str, list[float]]:
    """Per-step training values gathered between two evaluations, by history key."""
    return {key: [] for key in ("train_loss", "penalty_value", *risk_keys.values())}


def _means(logs: dict[str, list[float]]) -> dict[str, float]:
    """The mean of each gathered value; none for a key with no step since the last evaluation."""
    return {key: float(np.mean(values)) for key, values in logs.items() if values}


def train_network(build_network, train: WindowSetLike, val: dict[str, WindowSetLike] | None = None,
                  penalty: Penalty | None = None, fit_config: FitConfig | None = None,
                  seed: int = 0) -> tuple[torch.nn.Module, TrainResult]:
    """Build a network with `build_network()` under the seed and train it; returns (network, result).

    The returned network holds the weights of the LAST step; pick another with result.snapshots.
    """
    started = time.perf_counter()
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
    penalty.reset()

    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)  # weight init and dropout draw from the (forked) global generator
        network = build_network()
        sampler_generator = torch.Generator().manual_seed(seed)
        sampler = make_sampler(cfg.sampling, np.asarray(train.env), cfg.batch_size, sampler_generator,
                               penalty.min_windows_per_env)
        _check_batches(sampler, penalty, train.env_names, cfg)
        X = torch.from_numpy(np.ascontiguousarray(train.X, dtype=np.float32))
        y = torch.from_numpy(np.ascontiguousarray(train.y, dtype=np.float32))
        optimizer = make_optimizer(network, cfg)
        history, snapshots = [], {}
        best_value, best_step, evals_without_gain = math.inf, None, 0
        stop_reason, step, eval_seconds = "max_steps", 0, 0.0
        env_names = [train.env_names[e] for e in sampler.env_ids]
        # penalty log key -> history key of each environment's training risk
        risk_keys = {f"risk/{e}": f"train/risk/{name}" for e, name in enumerate(env_names)}
        since_eval = _empty_training_logs(risk_keys)

        while step < cfg.max_steps:
            if penalty.resets_optimizer_at(step):
                optimizer = make_optimizer(network, cfg)
            network.train()
            index = torch.cat(sampler.next_batch())  # one gather of inputs and one of targets per step
            preds_by_env = list(torch.split(network(X[index]), sampler.counts))
            targets_by_env = list(torch.split(y[index], sampler.counts))
            loss, logs = penalty(preds_by_env, targets_by_env, step, env_weights=sampler.risk_weights)
            if not math.isfinite(logs["loss"]):  # the penalty's float of the loss: no second pass over it
                stop_reason = "non_finite_loss"
                break
            optimizer.zero_grad(set_to_none=True)
            loss.backward()
            if cfg.grad_clip > 0:
                torch.nn.utils.clip_grad_norm_(network.parameters(), cfg.grad_clip)
            optimizer.step()
            step += 1
            # Unscaled objective (loss / loss_scale) so histories with and without rescaling compare.
            since_eval["train_loss"].append(logs["loss"] / logs["loss_scale"])
            since_eval["penalty_value"].append(logs["penalty_value"])
            for risk_key, history_key in risk_keys.items():
                since_eval[history_key].append(logs[risk_key])

            if step % cfg.eval_every == 0 or step == cfg.max_steps:
                entry = {"step": step, "penalty_weight": logs["penalty_weight"]}
                entry.update(_means(since_eval))
                eval_started = time.perf_counter()
                entry.update(evaluate(network, val))
                eval_seconds += time.perf_counter() - eval_started
                history.append(entry)
                since_eval = _empty_training_logs(risk_keys)
                if step <= penalty.warmup_steps:
                    continue  # a warm-up model: on the curve, never selected, not counted for stopping
                snapshots[step] = copy_state(network)
                criterion = entry.get(f"val/{EARLY_STOP_SET}/all")
                if criterion is not None:
                    if criterion < best_value:
                        best_value, best_step, evals_without_gain = criterion, step, 0
                    else:
                        evals_without_gain += 1
                        if evals_without_gain >= cfg.patience:
                            stop_reason = "early_stopping"
                            break

        if step not in snapshots:  # stopped on a non-finite loss between evaluations: keep the state
            entry = {"step": step, "penalty_weight": penalty.effective_weight(step)}
            entry.update(_means(since_eval))
            eval_started = time.perf_counter()
            entry.update(evaluate(network, val))
            eval_seconds += time.perf_counter() - eval_started
            history.append(entry)
            snapshots[step] = copy_state(network)

    result = TrainResult(history=history, snapshots=snapshots, best_step=best_step, final_step=step,
                         stop_reason=stop_reason, fit_seconds=time.perf_counter() - started,
                         train_env_names=env_names, eval_seconds=eval_seconds)
    return network, result
