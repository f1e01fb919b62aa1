"""Seeds together: every seed of one fit trained as one ensemble, each seed bit-identical to training it
alone with pipeline.train_loop.train_network.

Reads in-memory window sets; writes nothing; obeys the `fit` group (pipeline.fit_config.FitConfig) and a
penalty from pipeline.penalties, exactly as train_network does. Only the `linear` family and the `mlp`
family without dropout (the default), both with `model.level` none, are trained together: their step is
so small that the loop around it costs most of the time, and here one backward pass, one Adam step
(fused, over every seed's tensors), one gradient-norm call and one evaluation pass per validation chunk
serve all the seeds (bench/seed_ensemble.py measures the gain). Recurrent and attention networks spend their time in
the products themselves, gain nothing this way and stay sequential (`stackable` says which).

Why each seed's result is the one it gets alone (tests/test_ensemble.py checks weights, forecasts,
histories and snapshots bit for bit):
- weights: each seed's network is built under its own seed, as train_network builds it;
- batches: each seed keeps its own sampler and torch.Generator seeded with the seed;
- forward: nn.Linear's own kernel on each seed's own batch (a batched matrix product, torch.baddbmm, gives
  the same forecasts but rounds some weight gradients differently, depending on the shapes);
- loss: each seed's penalty (its own copy: Group DRO keeps state) on its own slice; the backward pass
  of their sum hands each seed the gradient of its own loss, times exactly 1;
- clipping: each seed's own gradient norm, clipped as clip_grad_norm_ clips it (train_loop.clip_gradient_norms);
- Adam: one fused optimizer over every seed's own tensors updates each tensor as that seed's optimizer
  would (one stacked tensor would not: fused Adam rounds a tensor's last elements apart from the rest);
- bookkeeping, evaluation every `eval_every` steps, snapshots and early stopping per seed
  (pipeline.train_loop.FitProgress); a seed that stops keeps its state while the others go on.
"""

from __future__ import annotations

import copy
import math
import time

import numpy as np
import torch
from torch import nn

from pipeline.fit_config import FitConfig
from pipeline.penalties import BatchLayout, Penalty
from pipeline.sampling import make_sampler
from pipeline.train_loop import (EVAL_CHUNK, FitProgress, TrainResult, _check_batches, clip_gradient_norms,
                                 copy_state, make_optimizer, prepare_fit, training_tensors, validation_scores)


def affine_layers(network: nn.Module) -> list[tuple[str, nn.Linear]] | None:
    """The (state_dict prefix, layer) of every nn.Linear of a stackable network, in forward order, or None
    when it is not one: a linear map, or an MLP (ReLU between layers) without active dropout."""
    from pipeline.models.networks import LinearMap, MLPNet

    if isinstance(network, LinearMap):
        return [("head", network.head)]
    if not isinstance(network, MLPNet):
        return None
    layers = []
    for index, module in enumerate(network.body):
        if isinstance(module, nn.Linear):
            layers.append((f"body.{index}", module))
        elif isinstance(module, nn.Dropout) and module.p > 0:
            return None  # dropout masks draw from each seed's global RNG in turn: not reproducible stacked
        elif not isinstance(module, (nn.ReLU, nn.Dropout)):
            return None
    return layers + [("head", network.head)]


def stackable(network: nn.Module) -> bool:
    return affine_layers(network) is not None


class StackedAffineChain(nn.Module):
    """K networks of one architecture run as one module: each member's layers applied to its own inputs."""

    def __init__(self, networks: list[nn.Module]):
        super().__init__()
        chains = [affine_layers(network) for network in networks]
        if any(chain is None for chain in chains):
            raise ValueError("only linear and mlp networks without dropout or level wrapper can be stacked")
        self.members = nn.ModuleList(networks)
        self.layers = [[layer for _, layer in chain] for chain in zip(*chains)]  # per layer, every member's

    def forward(self, inputs: list[torch.Tensor], members: list[int]) -> list[torch.Tensor]:
        """Forecasts (B, H) of members[i] from inputs[i] (B, L, F), for every i. Each member's own batch,
        gathered just before its layers use it: one stacked (K, B, L, F) gather would not stay in cache."""
        forecasts = []
        for X, k in zip(inputs, members):
            hidden = X.flatten(1)
            for i, layer in enumerate(self.layers):
                # nn.Linear's own kernel on each member's inputs (see the module docstring: not baddbmm)
                hidden = nn.functional.linear(hidden, layer[k].weight, layer[k].bias)
                if i < len(self.layers) - 1:
                    hidden = torch.relu(hidden)
            forecasts.append(hidden)
        return forecasts

    def predict(self, X: np.ndarray, members: list[int]) -> np.ndarray:
        """Forecasts (len(members), n, H) in chunks of EVAL_CHUNK windows, as predict_network makes them."""
        X_t = torch.from_numpy(np.ascontiguousarray(X, dtype=np.float32))
        with torch.no_grad():
            outputs = [torch.stack(self([X_t[start:start + EVAL_CHUNK]] * len(members), members))
                       for start in range(0, len(X_t), EVAL_CHUNK)]
        return torch.cat(outputs, dim=1).numpy()


def train_ensemble(build_network, train, val: dict | None = None, penalty: Penalty | None = None,
                   fit_config: FitConfig | None = None,
                   seeds: list[int] = (0,)) -> list[tuple[nn.Module, TrainResult]]:
    """[(network, result)] per seed, each equal bit for bit to train_network(..., seed=seed).

    Each result's fit_seconds is its share of the ensemble's wall time (the total over the number of seeds).
    """
    started = time.perf_counter()
    cfg, penalty, val = prepare_fit(train, val, penalty, fit_config)
    networks, samplers, penalties = [], [], []
    for seed in seeds:
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(seed)  # as train_network: the network is built first under the seed
            networks.append(build_network())
        samplers.append(make_sampler(cfg.sampling, np.asarray(train.env), cfg.batch_size,
                                     torch.Generator().manual_seed(seed), penalty.min_windows_per_env))
        penalties.append(copy.deepcopy(penalty))
        penalties[-1].reset()
    _check_batches(samplers[0], penalty, train.env_names, cfg)
    stacked = StackedAffineChain(networks)
    parameter_groups = [list(network.parameters()) for network in networks]  # clipped seed by seed
    env_names = [train.env_names[e] for e in samplers[0].env_ids]
    progress = [FitProgress(env_names, member_penalty, cfg) for member_penalty in penalties]
    final_step, final_state = {}, {}
    X, y = training_tensors(train)
    layout = BatchLayout(samplers[0].counts)  # every seed's batch has the same environment counts
    optimizer = make_optimizer(stacked, cfg)
    active, step = list(range(len(seeds))), 0

    def evaluate(members: list[int], weights: dict[int, float], final: bool = False) -> None:
        if not members:
            return
        eval_started = time.perf_counter()
        forecasts = {name: stacked.predict(windows.X, members) for name, windows in val.items() if len(windows.y)}
        seconds = (time.perf_counter() - eval_started) / len(members)
        for row, k in enumerate(members):
            scores = validation_scores({name: f[row] for name, f in forecasts.items()}, val)
            progress[k].add_evaluation(step, weights[k], scores, seconds, lambda k=k: copy_state(networks[k]), final)

    def stop(k: int) -> None:
        active.remove(k)
        final_step[k], final_state[k] = step, copy_state(networks[k])

    stacked.train()  # once: evaluations (StackedAffineChain.predict) do not switch it to eval mode
    while step < cfg.max_steps and active:
        if penalty.resets_optimizer_at(step):
            optimizer = make_optimizer(stacked, cfg)
        batches = [torch.cat(sampler.next_batch()) for sampler in samplers]  # every seed draws, stopped or not
        predictions = dict(zip(active, stacked([X.index_select(0, batches[k]) for k in active], active)))
        losses, step_terms, diverged = [], {}, []
        for k in active:
            terms = penalties[k].objective(predictions[k], y.index_select(0, batches[k]), layout, step,
                                           env_weights=samplers[k].risk_weights)
            if not math.isfinite(terms.loss_value()):
                diverged.append(k)
                continue
            losses.append(terms.loss)
            step_terms[k] = terms
        for k in diverged:  # as train_network: the state before this step is the fit's last
            progress[k].stop_reason = "non_finite_loss"
            stop(k)
        evaluate([k for k in diverged if step not in progress[k].snapshots],
                 {k: penalties[k].effective_weight(step) for k in diverged}, final=True)
        if not losses:
            break
        optimizer.zero_grad(set_to_none=True)
        torch.stack(losses).sum().backward()
        if cfg.grad_clip > 0:
            clip_gradient_norms(parameter_groups, cfg.grad_clip)
        optimizer.step()
        step += 1
        for k, terms in step_terms.items():
            progress[k].record_step(terms)
        due = [k for k in step_terms if progress[k].evaluation_due(step)]
        evaluate(due, {k: step_terms[k].weight for k in due})
        for k in due:
            if progress[k].stop_reason:
                stop(k)
    for k in list(active):
        stop(k)
    fit_seconds = (time.perf_counter() - started) / len(seeds)
    results = []
    for k, network in enumerate(networks):
        network.load_state_dict(final_state[k])
        network.eval()  # as train_network leaves it: its last act is an evaluation
        results.append((network, progress[k].result(final_step[k], fit_seconds)))
    return results
