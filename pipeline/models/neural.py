"""Gradient-trained families: the wrapper that trains a torch network through the model contract, and
the thin family classes (linear, mlp, lstm, gru, transformer) that say which network to build.

Reads in-memory window sets; writes nothing; obeys the `model` config group keys of each family's
`Params`, plus `fit` (pipeline.fit_config.FitConfig) and a penalty when fitting. torch, the training loop
and the networks (pipeline.models.networks) are imported inside the methods that use them: the registry,
config validation and the DAG plan read `Params` and `trainable` from these classes without loading torch.
Defaults are small on purpose (a 2-core CPU demo trains dozens of runs), not tuned for accuracy.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from pipeline.errors import InputError
from pipeline.fit_config import FitConfig
from pipeline.models.base import ForecastModel, check_fraction, check_positive_ints
from pipeline.models.level import LevelParams

if TYPE_CHECKING:
    import torch


class TorchForecaster(ForecastModel):
    """Gradient-trained families: a subclass only says how to build its nn.Module.

    After fit the model holds the snapshot of `best_step_` (lowest `val/source/all`) when a validation
    set named "source" was given, otherwise the weights of the last step; `use_snapshot(step)` switches
    to any step in `snapshot_steps_` (e.g. for another model-selection rule).
    """

    trainable = True

    def build_network(self, lookback: int, n_features: int, horizon: int) -> "torch.nn.Module":
        raise NotImplementedError

    def _network(self) -> "torch.nn.Module":
        """The family's network, wrapped by the level option (pipeline.models.level) when one is set."""
        network = self.build_network(self.lookback_, self.n_features_, self.horizon_)
        mode = getattr(self.hparams_, "level", "none")
        if mode == "none":
            return network  # unwrapped: state_dict keys stay those of runs logged before the option
        from pipeline.models.networks import LevelNormalised

        return LevelNormalised(network, mode, self.target_index_)

    def fit(self, train, val=None, penalty=None, fit_config=None) -> "TorchForecaster":
        from pipeline.train_loop import train_network

        self._start_fit(train)
        if isinstance(fit_config, dict):
            fit_config = FitConfig.from_dict(fit_config)
        network, result = train_network(self._network, train, val=val, penalty=penalty,
                                        fit_config=fit_config, seed=self.seed)
        return self._adopt(network, result)

    @classmethod
    def fit_together(cls, models: list["TorchForecaster"], train, val=None, penalty=None,
                     fit_config=None) -> list["TorchForecaster"]:
        """Fit models that differ only in their seed, each exactly as its own `fit` would. Where the network
        allows (pipeline.ensemble.stackable: linear, mlp without dropout, level none) all seeds train as one
        ensemble, otherwise one after the other."""
        from pipeline.ensemble import train_ensemble

        first = models[0]
        if any(type(model) is not type(first) or model.params != first.params for model in models):
            raise ValueError("fit_together needs models of one family and hyperparameters (seeds may differ)")
        if isinstance(fit_config, dict):
            fit_config = FitConfig.from_dict(fit_config)
        if len(models) == 1 or not first.trains_together(train):
            return [model.fit(train, val=val, penalty=penalty, fit_config=fit_config) for model in models]
        for model in models:
            model._start_fit(train)
        fits = train_ensemble(first._network, train, val, penalty, fit_config, [model.seed for model in models])
        return [model._adopt(network, result) for model, (network, result) in zip(models, fits)]

    def trains_together(self, train) -> bool:
        """True when seeds of this model on windows like `train` train as one ensemble (fit_together)."""
        import torch

        from pipeline.ensemble import stackable

        self._start_fit(train)
        with torch.random.fork_rng(devices=[]):  # building a probe network draws init values: keep RNG
            return stackable(self._network())

    def _adopt(self, network, result) -> "TorchForecaster":
        """Take a finished fit's network and results (pipeline.train_loop.TrainResult)."""
        self.network_ = network
        self.history_ = result.history
        self._snapshots = result.snapshots
        self.snapshot_steps_ = sorted(result.snapshots)
        self.best_step_ = result.best_step
        self.stop_reason_ = result.stop_reason
        self.steps_trained_ = result.final_step
        self.n_parameters_ = sum(p.numel() for p in self.network_.parameters())
        if self.best_step_ is not None:
            self.use_snapshot(self.best_step_)
        self._finish_fit()
        return self

    def use_snapshot(self, step: int) -> "TorchForecaster":
        self._check_fitted()
        snapshots = getattr(self, "_snapshots", {})
        if step not in snapshots:
            raise InputError(f"no snapshot at step {step} (stored: {sorted(snapshots)})", field="step")
        self.network_.load_state_dict(snapshots[step])
        return self

    def predict(self, X: np.ndarray) -> np.ndarray:
        from pipeline.train_loop import predict_network

        X = self._check_X(X)
        if len(X) == 0:
            return np.zeros((0, self.horizon_), dtype=np.float32)
        return predict_network(self.network_, X)

    def state_dict(self) -> dict:
        import torch

        weights = {k: v.detach().clone() for k, v in self.network_.state_dict().items()}
        meta = {k: torch.from_numpy(v) for k, v in self._meta().items()}
        return {**weights, **meta}

    def load_state_dict(self, state: dict) -> "TorchForecaster":
        import torch

        weights = self._load_meta(state)
        with torch.random.fork_rng(devices=[]):  # building the module draws init values: keep RNG
            self.network_ = self._network()
        try:
            self.network_.load_state_dict({k: torch.as_tensor(np.asarray(v)) for k, v in weights.items()})
        except RuntimeError as exc:  # wrong family or hyperparameters: keep it to one line
            first_line = str(exc).strip().splitlines()[0]
            raise InputError(f"does not fit family {self.family!r} with {self.params}: {first_line}",
                             field="state_dict") from None
        self.n_parameters_ = sum(p.numel() for p in self.network_.parameters())
        return self


@dataclass
class StackParams(LevelParams):
    """Size of a stack of hidden layers (MLP) or recurrent layers (LSTM, GRU)."""
    hidden: int = 32  # units or state size: 32 keeps a 48-hour window at a few ms per batch on one thread
    layers: int = 1
    dropout: float = 0.0  # off by default: short runs with early stopping rarely need it

    def __post_init__(self):
        super().__post_init__()
        check_positive_ints(self, "hidden", "layers")
        check_fraction(self, "dropout")


class LinearForecaster(TorchForecaster):
    """Same map as ridge (flattened lags -> H) but trained by the shared loop, so it takes penalties."""

    family = "linear"

    @dataclass
    class Params(LevelParams):
        pass

    def build_network(self, lookback, n_features, horizon):
        from pipeline.models.networks import LinearMap

        return LinearMap(lookback, n_features, horizon)


class MLPForecaster(TorchForecaster):
    family = "mlp"

    # hidden: units per hidden layer; layers: hidden layers; dropout: in the hidden layers
    Params = StackParams

    def build_network(self, lookback, n_features, horizon):
        from pipeline.models.networks import MLPNet

        p = self.hparams_
        return MLPNet(lookback, n_features, horizon, p.hidden, p.layers, p.dropout)


class LSTMForecaster(TorchForecaster):
    family = "lstm"
    cell = "lstm"

    # hidden: state size; layers: stacked recurrent layers; dropout: between stacked layers only (ignored
    # with one layer)
    Params = StackParams

    def build_network(self, lookback, n_features, horizon):
        from pipeline.models.networks import RecurrentNet

        p = self.hparams_
        return RecurrentNet(self.cell, n_features, horizon, p.hidden, p.layers, p.dropout)


class GRUForecaster(LSTMForecaster):
    family = "gru"
    cell = "gru"


class TransformerForecaster(TorchForecaster):
    family = "transformer"

    @dataclass
    class Params(LevelParams):
        d_model: int = 32  # embedding width per hour
        heads: int = 2  # attention heads; must divide d_model
        layers: int = 1  # encoder layers
        ff: int = 64  # feed-forward width inside each layer (2 x d_model)
        dropout: float = 0.0  # off by default, as for the other families

        def __post_init__(self):
            super().__post_init__()
            check_positive_ints(self, "d_model", "heads", "layers", "ff")
            check_fraction(self, "dropout")
            if self.d_model % self.heads:
                raise InputError(f"d_model {self.d_model} is not a multiple of heads {self.heads}",
                                 field="model.heads")
            if self.d_model % 2:
                raise InputError(f"must be even for sine/cosine positions, got {self.d_model}",
                                 field="model.d_model")

    def build_network(self, lookback, n_features, horizon):
        from pipeline.models.networks import TransformerNet

        p = self.hparams_
        return TransformerNet(lookback, n_features, horizon, p.d_model, p.heads, p.layers, p.ff, p.dropout)
