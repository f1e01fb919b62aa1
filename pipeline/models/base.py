"""The contract every model family follows, and the base of the closed-form families.

Reads in-memory window sets (X (n, L, F), y (n, H), env, env_names, target_index; see
pipeline.window_check.WindowSetLike); writes nothing. Obeys the `model` config group: the keys of the
family's `Params` dataclass, plus the run seed. No torch here: the closed-form families, the registry and
config validation never load it (gradient-trained families: pipeline.models.neural.TorchForecaster).

Contract (sklearn-like): `__init__(seed=0, **params)` only checks the parameter NAMES and stores them
unchanged (`self.seed`, `self.params`); values are validated in `fit` (Params.__post_init__).
`fit(train, val=None, penalty=None, fit_config=None)` returns self; learned state ends in `_`:
`history_`, `snapshot_steps_`, `best_step_`, `stop_reason_`, `n_parameters_`, `fit_seconds_`.
`predict(X)` returns float32 (n, H) in scaled units. `state_dict()` returns a FLAT dict of arrays
(torch tensors for torch families, numpy arrays otherwise) holding the weights plus `_meta.lookback`,
`_meta.n_features`, `_meta.horizon`, `_meta.target_index` (0-d int64); `load_state_dict()` restores a
model that predicts identically, also into a fresh instance built with the same params.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass, fields
from types import SimpleNamespace
from typing import Any, ClassVar

import numpy as np

from pipeline.errors import InputError, check_keys
from pipeline.models import level
from pipeline.window_check import check_window_set


META_PREFIX = "_meta."  # state_dict keys that hold shapes, not weights
META_KEYS = ("lookback", "n_features", "horizon", "target_index")


class NotFittedError(RuntimeError):
    """predict/state_dict called before fit or load_state_dict."""


def as_numpy(value) -> np.ndarray:
    """A copy as a numpy array, whether the stored value is a torch tensor or array-like."""
    if hasattr(value, "detach"):  # a torch tensor; duck-typed so closed-form families never load torch
        return value.detach().cpu().numpy().copy()
    return np.array(value)


def check_positive_ints(params: Any, *names: str) -> None:
    """Shared Params validation: each named field is an int >= 1 (bool rejected)."""
    for name in names:
        value = getattr(params, name)
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
            raise InputError(f"must be an integer >= 1, got {value!r}", field=f"model.{name}")


def check_fraction(params: Any, name: str) -> None:
    value = getattr(params, name)
    if not isinstance(value, (int, float)) or not 0.0 <= value < 1.0:
        raise InputError(f"must be a number in [0, 1), got {value!r}", field=f"model.{name}")


class ForecastModel:
    """Base class: parameter handling, input checks, timing and the snapshot interface."""

    family: ClassVar[str] = "base"
    trainable: ClassVar[bool] = False

    @dataclass
    class Params:
        pass

    def __init__(self, seed: int = 0, **params):
        check_keys(params, {f.name for f in fields(self.Params)}, "model",
                   what=f"parameter of model family {self.family!r}")
        self.seed = seed
        self.params = dict(params)

    def __repr__(self) -> str:
        args = ", ".join([f"seed={self.seed!r}"] + [f"{k}={v!r}" for k, v in self.params.items()])
        return f"{type(self).__name__}({args})"

    # -- shared helpers ------------------------------------------------------------------------
    def _start_fit(self, train) -> None:
        self._fit_started = time.perf_counter()
        self.hparams_ = self.Params(**self.params)
        check_window_set(train, "train")
        if len(train.y) == 0:
            raise InputError("no training windows", field="train")
        if not hasattr(train, "target_index"):
            raise InputError("missing attribute 'target_index'", field="train")
        _, self.lookback_, self.n_features_ = train.X.shape
        self.horizon_ = train.y.shape[1]
        self.target_index_ = int(train.target_index)
        if not 0 <= self.target_index_ < self.n_features_:
            raise InputError(f"{self.target_index_} outside 0..{self.n_features_ - 1}",
                             field="train.target_index")

    def _finish_fit(self) -> None:
        self.fit_seconds_ = time.perf_counter() - self._fit_started

    def _meta(self) -> dict[str, np.ndarray]:
        """Shape facts needed to rebuild the model, as 0-d int64 arrays so the state stays flat."""
        self._check_fitted()
        values = (self.lookback_, self.n_features_, self.horizon_, self.target_index_)
        return {f"{META_PREFIX}{name}": np.array(v, dtype=np.int64) for name, v in zip(META_KEYS, values)}

    def _load_meta(self, state: dict) -> dict:
        """Restore the shape facts from a flat state; returns the remaining (weight) entries."""
        missing = [name for name in META_KEYS if f"{META_PREFIX}{name}" not in state]
        if missing:
            raise InputError(f"state of family {self.family!r} lacks {META_PREFIX}{missing[0]}",
                             field="state_dict")
        self.lookback_, self.n_features_, self.horizon_, self.target_index_ = (
            int(as_numpy(state[f"{META_PREFIX}{name}"])) for name in META_KEYS)
        self.hparams_ = self.Params(**self.params)
        for attr, default in (("history_", []), ("snapshot_steps_", []), ("best_step_", None),
                              ("stop_reason_", "loaded"), ("fit_seconds_", 0.0)):
            if not hasattr(self, attr):
                setattr(self, attr, default)
        return {k: v for k, v in state.items() if not k.startswith(META_PREFIX)}

    def _check_fitted(self) -> None:
        if not hasattr(self, "horizon_"):
            raise NotFittedError(f"model family {self.family!r} is not fitted: call fit or load_state_dict")

    def _check_X(self, X: np.ndarray) -> np.ndarray:
        self._check_fitted()
        X = np.asarray(X, dtype=np.float32)
        if X.ndim != 3 or X.shape[1:] != (self.lookback_, self.n_features_):
            raise InputError(f"expected shape (n, {self.lookback_}, {self.n_features_}), got {X.shape}",
                             field="X")
        return X


class ClosedFormModel(ForecastModel):
    """Families fitted without gradient steps (baselines, ridge, VAR).

    They ignore `val`, `penalty` and `fit_config`: any penalty, erm or not, is accepted and has NO
    effect (the grid labels such cells penalty "n/a"). history_ == [] and the only snapshot is step 0.
    A family whose Params carry `level` (pipeline.models.level) is fitted and predicts on windows made
    relative to their own level; the subclass code never sees the difference.
    """

    trainable = False

    def _level_mode(self) -> str:
        return getattr(self.hparams_, "level", "none")

    def fit(self, train, val=None, penalty=None, fit_config=None) -> "ClosedFormModel":
        self._start_fit(train)
        if self._level_mode() != "none":
            X = np.asarray(train.X, dtype=np.float64)
            loc, scale = level.window_level(X, self.target_index_, self._level_mode())
            train = SimpleNamespace(X=level.relative_inputs(X, loc, scale, self.target_index_),
                                    y=level.relative_target(np.asarray(train.y, dtype=np.float64), loc, scale),
                                    env=train.env, env_names=train.env_names, target_index=self.target_index_)
        self._fit_closed_form(train)
        self.n_parameters_ = sum(int(np.size(v)) for v in self._weights().values())
        self.history_, self.snapshot_steps_ = [], [0]
        self.best_step_, self.stop_reason_ = 0, "closed_form"
        self._finish_fit()
        return self

    def use_snapshot(self, step: int) -> "ClosedFormModel":
        self._check_fitted()
        if step != 0:
            raise InputError(f"family {self.family!r} has only snapshot step 0, got {step}", field="step")
        return self

    def predict(self, X: np.ndarray) -> np.ndarray:
        X = self._check_X(X)
        if self._level_mode() == "none":
            return np.asarray(self._predict_closed_form(X), dtype=np.float32).reshape(len(X), self.horizon_)
        X = X.astype(np.float64)
        loc, scale = level.window_level(X, self.target_index_, self._level_mode())
        relative = self._predict_closed_form(level.relative_inputs(X, loc, scale, self.target_index_))
        return np.asarray(level.restore(np.reshape(relative, (len(X), self.horizon_)), loc, scale), dtype=np.float32)

    def state_dict(self) -> dict:
        return {**{k: np.array(v) for k, v in self._weights().items()}, **self._meta()}

    def load_state_dict(self, state: dict) -> "ClosedFormModel":
        weights = {k: as_numpy(v) for k, v in self._load_meta(state).items()}
        try:
            self._set_weights(weights)
        except KeyError as exc:
            raise InputError(f"state lacks {exc.args[0]!r} for family {self.family!r}",
                             field="state_dict") from None
        self.n_parameters_ = sum(int(np.size(v)) for v in weights.values())
        return self

    # -- what a closed-form family supplies ----------------------------------------------------
    def _fit_closed_form(self, train) -> None:
        """Learn from `train`; self.lookback_, n_features_, horizon_, target_index_ are already set."""
        raise NotImplementedError

    def _predict_closed_form(self, X: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def _weights(self) -> dict[str, np.ndarray]:
        """Learned arrays beyond the meta data ({} for the baselines)."""
        return {}

    def _set_weights(self, weights: dict[str, np.ndarray]) -> None:
        pass
