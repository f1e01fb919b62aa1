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
# fit.validation_windows: which validation windows a fit is evaluated and selected on (pipeline.train);
# the first is the default.
VALIDATION_WINDOW_MODES = ("non_overlapping", "all")
# What a job slice written before fit.validation_windows existed was evaluated on: every window. A re-run
# or a twin check of such a run must read it so, not with today's default.
VALIDATION_WINDOWS_BEFORE_THE_KEY = "all"


def validation_windows_of(fit: dict) -> str:
    """A job slice's fit.validation_windows, checked; a slice from before the key existed gets `all`."""
    return FitConfig(**{"validation_windows": VALIDATION_WINDOWS_BEFORE_THE_KEY, **fit}).validation_windows


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
    # Validation windows evaluated during the fit and for model selection (pipeline.train), for every
    # family and rule: non_overlapping keeps, per set and station, only windows whose forecast targets do
    # not overlap (origins >= forecast.horizon_hours apart): overlapping windows repeat most target hours,
    # so this keeps the information at horizon / stride times less evaluation; all: every window. A fit
    # setting, not a forecast one: it changes how a fit is monitored, not which windows exist (test
    # metrics always use every test window).
    validation_windows: str = VALIDATION_WINDOW_MODES[0]

    def __post_init__(self):
        for name, modes in (("sampling", SAMPLING_MODES), ("validation_windows", VALIDATION_WINDOW_MODES)):
            if getattr(self, name) not in modes:
                raise InputError(f"must be one of {', '.join(modes)}, got {getattr(self, name)!r}",
                                 field=f"fit.{name}")
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
