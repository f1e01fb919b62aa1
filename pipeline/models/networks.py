"""The torch networks of the gradient-trained families (nn.Modules only; wrappers in pipeline.models.neural).

Reads nothing and writes nothing; obeys no config key itself (the wrappers pass each family's `Params`).
Every network maps a batch of windows X (B, L, F) to forecasts (B, H) of the scaled target. The wrappers
import this module inside `build_network`, so that the family registry loads torch only when a network
is built.
"""

from __future__ import annotations

import math

import torch
from torch import nn


class LinearMap(nn.Module):
    """One affine map from all flattened lags (L * F values) to the H horizon steps."""

    def __init__(self, lookback: int, n_features: int, horizon: int):
        super().__init__()
        self.head = nn.Linear(lookback * n_features, horizon)

    def forward(self, X: torch.Tensor) -> torch.Tensor:
        return self.head(X.flatten(1))


class MLPNet(nn.Module):
    """Flattened lags -> `layers` x (Linear, ReLU, Dropout) of width `hidden` -> Linear to H."""

    def __init__(self, lookback: int, n_features: int, horizon: int, hidden: int, layers: int,
                 dropout: float):
        super().__init__()
        blocks, width = [], lookback * n_features
        for _ in range(layers):
            blocks += [nn.Linear(width, hidden), nn.ReLU(), nn.Dropout(dropout)]
            width = hidden
        self.body = nn.Sequential(*blocks)
        self.head = nn.Linear(width, horizon)

    def forward(self, X: torch.Tensor) -> torch.Tensor:
        return self.head(self.body(X.flatten(1)))


class RecurrentNet(nn.Module):
    """LSTM or GRU over the L hours; the last hidden state is mapped to all H steps at once (direct
    multi-step forecast, no iterated feeding of predictions)."""

    def __init__(self, cell: str, n_features: int, horizon: int, hidden: int, layers: int, dropout: float):
        super().__init__()
        rnn_class = {"lstm": nn.LSTM, "gru": nn.GRU}[cell]
        # torch applies dropout only between stacked layers and warns when there is a single layer.
        self.rnn = rnn_class(n_features, hidden, num_layers=layers, batch_first=True,
                             dropout=dropout if layers > 1 else 0.0)
        self.head = nn.Linear(hidden, horizon)

    def forward(self, X: torch.Tensor) -> torch.Tensor:
        outputs, _ = self.rnn(X)
        return self.head(outputs[:, -1])


def sinusoidal_positions(length: int, d_model: int) -> torch.Tensor:
    """Fixed sine/cosine position codes (Vaswani et al. 2017), shape (length, d_model)."""
    position = torch.arange(length, dtype=torch.float32)[:, None]
    frequency = torch.exp(torch.arange(0, d_model, 2, dtype=torch.float32) * (-math.log(10000.0) / d_model))
    codes = torch.zeros(length, d_model)
    codes[:, 0::2] = torch.sin(position * frequency)
    codes[:, 1::2] = torch.cos(position * frequency[: d_model // 2])
    return codes


class TransformerNet(nn.Module):
    """Per-hour linear embedding + fixed positions -> Transformer encoder -> last hour's state -> H."""

    def __init__(self, lookback: int, n_features: int, horizon: int, d_model: int, heads: int,
                 layers: int, ff: int, dropout: float):
        super().__init__()
        self.embed = nn.Linear(n_features, d_model)
        self.register_buffer("positions", sinusoidal_positions(lookback, d_model), persistent=False)
        layer = nn.TransformerEncoderLayer(d_model, heads, dim_feedforward=ff, dropout=dropout,
                                           batch_first=True)
        # Nested tensors only help with padding masks, which fixed-length windows never have.
        self.encoder = nn.TransformerEncoder(layer, num_layers=layers, enable_nested_tensor=False)
        self.head = nn.Linear(d_model, horizon)

    def forward(self, X: torch.Tensor) -> torch.Tensor:
        hidden = self.encoder(self.embed(X) + self.positions)
        return self.head(hidden[:, -1])


class LevelNormalised(nn.Module):
    """A network that sees each window relative to its own level and forecasts back at that level
    (pipeline.models.level: "delta" or "revin"). For "revin" the normalised target channel gets RevIN's
    learnable affine pair (Kim et al. 2022: x' = gamma * x_norm + beta on input, (y' - beta) / gamma on
    output), a scalar each since only the target channel is normalised."""

    def __init__(self, inner: nn.Module, mode: str, target_index: int):
        super().__init__()
        self.inner, self.mode, self.target_index = inner, mode, int(target_index)
        if mode == "revin":
            self.affine_weight = nn.Parameter(torch.ones(1))
            self.affine_bias = nn.Parameter(torch.zeros(1))

    def forward(self, X: torch.Tensor) -> torch.Tensor:
        from pipeline.models import level

        loc, scale = level.window_level(X, self.target_index, self.mode)
        if self.mode != "revin":
            return level.restore(self.inner(level.relative_inputs(X, loc, scale, self.target_index)), loc, scale)
        relative = level.relative_inputs(X, loc, scale, self.target_index, self.affine_weight, self.affine_bias)
        # eps^2 keeps the division finite should gamma reach 0 (as the RevIN authors' code does [from memory]).
        output = (self.inner(relative) - self.affine_bias) / (self.affine_weight + level.REVIN_EPS ** 2)
        return level.restore(output, loc, scale)
