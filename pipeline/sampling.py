"""Batch composition of the training loop (`fit.sampling`): which windows of which environment a step sees,
and how much each environment's risk weighs in the loss.

Reads the environment index of every training window; writes nothing. Obeys `fit.sampling` and
`fit.batch_size` (pipeline.fit_config) and the penalty's fewest windows per environment.

- "balanced" (default): batch_size // E windows of each of the E environments, drawn with replacement
  within the environment; every environment's risk weighs 1/E. Small cities count as much as large ones.
- "pooled": the batch follows the pooled training data: environment e gets its share N_e / N of the
  batch (largest-remainder rounding), drawn with replacement, and its risk weighs N_e / N, so the risk
  term estimates the risk on the pooled windows, as ERM on pooled data does. Every environment keeps at
  least `min_per_env` windows per batch so that per-environment terms stay defined; because the weights
  are the population shares, not the batch counts, that floor does not bias the risk term.

Both draw from a dedicated, seeded torch.Generator (index_select rather than advanced indexing: the same
windows, at less cost per step). The sampling a run used is part of its protocol: a
penalised run and its ERM twin must share it (pipeline.twins), and the grid pairs twins by it.
"""

from __future__ import annotations

import numpy as np
import torch

from pipeline.fit_config import SAMPLING_MODES


class EnvironmentBalancedSampler:
    """Draws per_env indices of every environment present in `env`, with replacement, from `generator`."""

    risk_weights = None  # the penalty's default: 1/E per environment

    def __init__(self, env: np.ndarray, batch_size: int, generator: torch.Generator, min_per_env: int = 1):
        self.env_ids = np.unique(env)
        self.indices = [torch.from_numpy(np.flatnonzero(env == e)) for e in self.env_ids]
        # With more environments than batch slots, every environment still gets one window.
        self.per_env = max(1, batch_size // len(self.env_ids))
        self.counts = [self.per_env] * len(self.env_ids)
        self.generator = generator

    def next_batch(self) -> list[torch.Tensor]:
        """One index tensor per environment (in the order of self.env_ids), each of length per_env."""
        return [idx.index_select(0, torch.randint(len(idx), (self.per_env,), generator=self.generator))
                for idx in self.indices]


class PooledSampler:
    """Draws each environment's share of the batch (at least min_per_env windows), with replacement."""

    def __init__(self, env: np.ndarray, batch_size: int, generator: torch.Generator, min_per_env: int = 1):
        self.env_ids = np.unique(env)
        self.indices = [torch.from_numpy(np.flatnonzero(env == e)) for e in self.env_ids]
        sizes = np.array([len(idx) for idx in self.indices], dtype=np.float64)
        shares = sizes / sizes.sum()
        quota = batch_size * shares
        counts = np.floor(quota).astype(int)
        # Largest remainder: the slots left by rounding down go to the largest fractional parts (stable).
        left = int(batch_size - counts.sum())
        counts[np.argsort(-(quota - counts), kind="stable")[:left]] += 1
        self.counts = np.maximum(counts, max(1, min_per_env)).tolist()
        self.risk_weights = torch.from_numpy(shares)
        self.generator = generator

    def next_batch(self) -> list[torch.Tensor]:
        """One index tensor per environment (in the order of self.env_ids), of length counts[e]."""
        return [idx.index_select(0, torch.randint(len(idx), (count,), generator=self.generator))
                for idx, count in zip(self.indices, self.counts)]


SAMPLERS = {"balanced": EnvironmentBalancedSampler, "pooled": PooledSampler}  # keys: fit_config.SAMPLING_MODES


def make_sampler(mode: str, env: np.ndarray, batch_size: int, generator: torch.Generator, min_per_env: int = 1):
    return SAMPLERS[mode](env, batch_size, generator, min_per_env)
