"""Level handling shared by every learned family: forecast relative to each window's own level.

Reads windows X (n, L, F) and targets y (n, H) as numpy arrays or torch tensors (the arithmetic below
works on both, so closed-form families use it without torch and networks use it inside forward());
writes nothing. Obeys `model.level` of every learned family (the `LevelParams` field).

Why: features are scaled with the mean and standard deviation of the SOURCE cities' training rows
(pipeline.features), so a target city whose level differs (another climate, another emission level) is
fed inputs far from what the model saw, and a model that learned the sources' level forecasts at that
level. Two remedies, applied to the target variable's input channel (`target_index`) and to y:

- "delta": forecast the change from the last observed value. loc = x_target[last hour], scale = 1; the
  target channel becomes x - loc, the model learns y - loc, the forecast is loc + model output. Adding a
  constant to the target series changes nothing the model sees.
- "revin": reversible instance normalisation (Kim et al. 2022, "Reversible Instance Normalization for
  Accurate Time-Series Forecasting against Distribution Shift", ICLR): loc = mean of the target channel
  over the window, scale = sqrt(population variance + eps); the channel becomes (x - loc) / scale, the
  model learns (y - loc) / scale, the forecast is loc + scale * output. Also removes a change of scale.
  Gradient-trained families add RevIN's learnable affine pair (pipeline.models.neural.LevelNormalised);
  closed-form ones use the plain normalisation.
- "none": the window as it comes (the behaviour before these options existed).

Other features keep the global scaling: calendar sine/cosine columns have no level, and a window's
weather is information, not an offset to remove.
"""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.errors import InputError

LEVEL_MODES = ("none", "revin", "delta")
REVIN_EPS = 1e-5  # added to the variance before the square root, as in the RevIN paper's code [from memory]


@dataclass
class LevelParams:
    """The `level` option; every learned family's Params inherits it (and calls this __post_init__)."""

    level: str = "none"  # none | revin | delta: see pipeline.models.level

    def __post_init__(self):
        if self.level not in LEVEL_MODES:
            raise InputError(f"must be one of {', '.join(LEVEL_MODES)}, got {self.level!r}", field="model.level")


def window_level(X, target_index: int, mode: str):
    """(loc, scale), each of shape (n, 1): the level and spread each window's target is measured against."""
    channel = X[:, :, target_index]
    if mode == "delta":
        return channel[:, -1:], channel[:, -1:] * 0 + 1
    if mode == "revin":
        loc = channel.mean(axis=1, keepdims=True)
        variance = ((channel - loc) ** 2).mean(axis=1, keepdims=True)  # population variance (ddof 0)
        return loc, (variance + REVIN_EPS) ** 0.5
    raise ValueError(f"no window level for mode {mode!r}")


def relative_inputs(X, loc, scale, target_index: int, weight=1.0, bias=0.0):
    """A copy of X whose target channel is weight * (x - loc) / scale + bias; the other channels unchanged.
    weight and bias: RevIN's learnable affine pair (torch parameters), 1 and 0 otherwise."""
    out = X * 1  # a copy for numpy arrays and torch tensors alike (keeps the dtype)
    out[:, :, target_index] = (X[:, :, target_index] - loc) / scale * weight + bias
    return out


def relative_target(y, loc, scale):
    return (y - loc) / scale


def restore(output, loc, scale):
    """A forecast in the window's level again: the inverse of relative_target."""
    return output * scale + loc
