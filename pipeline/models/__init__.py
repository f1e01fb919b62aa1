"""Model families behind one sklearn-like interface (see pipeline.models.base for the contract).

Reads nothing and writes nothing. `build_model(family, params, seed)` obeys the `model` config group:
`model.family` picks the class, the other keys are that family's `Params`. Importing the registry loads
no torch (the family modules import it inside the methods that train), so config validation and the
DAG plan use it freely.
"""

from __future__ import annotations

from pipeline.errors import InputError
from pipeline.models.base import ClosedFormModel, ForecastModel, NotFittedError
from pipeline.models.baselines import Persistence, SeasonalNaive
from pipeline.models.linear_models import RidgeLags, VectorAutoregression
from pipeline.models.neural import (GRUForecaster, LinearForecaster, LSTMForecaster, MLPForecaster,
                                    TorchForecaster, TransformerForecaster)

MODEL_FAMILIES: dict[str, type[ForecastModel]] = {
    cls.family: cls
    for cls in (Persistence, SeasonalNaive, RidgeLags, VectorAutoregression, LinearForecaster,
                MLPForecaster, LSTMForecaster, GRUForecaster, TransformerForecaster)
}


def build_model(family: str, params: dict | None = None, seed: int = 0) -> ForecastModel:
    """An unfitted model of `family` with hyperparameters `params` (unknown family/key -> InputError)."""
    if family not in MODEL_FAMILIES:
        raise InputError(f"unknown model family {family!r} (known: {', '.join(MODEL_FAMILIES)})",
                         field="model.family")
    return MODEL_FAMILIES[family](seed=seed, **dict(params or {}))


__all__ = ["MODEL_FAMILIES", "build_model", "ForecastModel", "ClosedFormModel", "TorchForecaster",
           "NotFittedError"]
