"""Optimisation settings of gradient-trained families: the `fit` config group's schema.

Reads nothing and writes nothing. Lives apart from pipeline.train_loop so that the config schema and the
DAG plan (pipeline.config, pipeline.workflow) use it without loading torch. Config keys: every field of
`FitConfig` under `fit`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from pipeline.errors import InputError, from_mapping

SAMPLING_MODES = ("balanced", "pooled")  # fit.sampling; the samplers live in pipeline.sampling


@dataclass
class FitConfig:
    """Optimisation settings. Defaults are sized for a 2-core CPU demo, not for best accuracy."""

    max_steps: int = 300  # optimizer steps (batches), not epochs: cost is the same whatever n is
    batch_size: int = 128  # windows per step in total, split equally between environments
    lr: float = 1e-3  # Adam learning rate (Adam's usual default)
    weight_decay: float = 0.0  # L2 term inside Adam (coupled, as torch.optim.Adam does it)
    eval_every: int = 25  # steps between validation evaluations / snapshots
    patience: int = 8  # evaluations without improvement of val/source/all before stopping
    grad_clip: float = 1.0  # max global L2 norm of the gradient; 0 disables clipping
    threads: int = 1  # torch.set_num_threads; match the job's CPU allocation
    # Batch composition and each environment's weight in the loss: balanced (equal share and weight per
    # environment) or pooled (shares and weights follow the environments' sizes); see pipeline.sampling.
    sampling: str = "balanced"

    def __post_init__(self):
        if self.sampling not in SAMPLING_MODES:
            raise InputError(f"must be one of {', '.join(SAMPLING_MODES)}, got {self.sampling!r}",
                             field="fit.sampling")
        for name in ("max_steps", "batch_size", "eval_every", "patience", "threads"):
            value = getattr(self, name)
            if isinstance(value, bool) or int(value) != value or value < 1:
                raise InputError(f"must be an integer >= 1, got {value!r}", field=f"fit.{name}")
            setattr(self, name, int(value))
        for name in ("lr", "weight_decay", "grad_clip"):
            value = float(getattr(self, name))
            if not math.isfinite(value) or value < 0 or (name == "lr" and value == 0):
                raise InputError(f"must be a finite number {'> 0' if name == 'lr' else '>= 0'}, "
                                 f"got {value!r}", field=f"fit.{name}")
            setattr(self, name, value)

    @classmethod
    def from_dict(cls, values: dict | None) -> "FitConfig":
        return from_mapping(cls, values, "fit")
