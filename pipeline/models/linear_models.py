"""Closed-form linear families: ridge on flattened lags (scikit-learn) and a least-squares VAR iterated
over the horizon. The gradient-trained `linear` family, which takes penalties, is in pipeline.models.neural.

Reads window sets; writes nothing. Obeys `model.alpha` (ridge), `model.order`, `model.ridge`,
`model.max_rows` (var). No torch.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.errors import InputError
from pipeline.models.base import ClosedFormModel, check_positive_ints
from pipeline.models.level import LevelParams


class RidgeLags(ClosedFormModel):
    """sklearn Ridge from all L * F scaled lag values to the H steps (one joint multi-output fit)."""

    family = "ridge"

    @dataclass
    class Params(LevelParams):
        alpha: float = 1.0  # L2 strength on standardised inputs; 1.0 is scikit-learn's default

        def __post_init__(self):
            super().__post_init__()
            if not isinstance(self.alpha, (int, float)) or not self.alpha >= 0:
                raise InputError(f"must be a number >= 0, got {self.alpha!r}", field="model.alpha")

    def _fit_closed_form(self, train) -> None:
        X = np.asarray(train.X, dtype=np.float64).reshape(len(train.X), -1)
        from sklearn.linear_model import Ridge  # imported here: ~1 s that other families' jobs skip
        estimator = Ridge(alpha=float(self.hparams_.alpha)).fit(X, np.asarray(train.y, dtype=np.float64))
        self.coef_, self.intercept_ = estimator.coef_, estimator.intercept_

    def _predict_closed_form(self, X):
        return X.reshape(len(X), -1).astype(np.float64) @ self.coef_.T + self.intercept_

    def _weights(self):
        return {"coef": self.coef_, "intercept": self.intercept_}

    def _set_weights(self, weights):
        self.coef_, self.intercept_ = weights["coef"], weights["intercept"]


class VectorAutoregression(ClosedFormModel):
    """VAR(p) on the whole feature vector: x_t = c + sum_k A_k x_{t-k}, fitted by (lightly regularised)
    least squares on the one-hour transitions inside the training windows, then iterated H steps ahead
    from each window's last p hours; the forecast is the target component of each iterated vector."""

    family = "var"

    @dataclass
    class Params(LevelParams):
        order: int = 2  # lags in hours; 2 is the least order that follows a sine/cosine calendar exactly
        ridge: float = 1e-6  # tiny Tikhonov term: calendar and pollutant columns can be collinear
        max_rows: int = 100_000  # transitions used in the fit; a seeded subsample when there are more

        def __post_init__(self):
            super().__post_init__()
            check_positive_ints(self, "order", "max_rows")
            if not isinstance(self.ridge, (int, float)) or not self.ridge >= 0:
                raise InputError(f"must be a number >= 0, got {self.ridge!r}", field="model.ridge")

    def _fit_closed_form(self, train) -> None:
        order = self.hparams_.order
        n, L, F = train.X.shape
        if L <= order:
            raise InputError(f"var with order {order} needs a lookback above {order} hours, got {L}",
                             field="forecast.lookback_hours")
        per_window = L - order
        total = n * per_window
        rows = np.arange(total)
        if total > self.hparams_.max_rows:  # overlapping windows repeat transitions: a sample suffices
            rows = np.sort(np.random.default_rng(self.seed).choice(total, self.hparams_.max_rows, replace=False))
        window, hour = rows // per_window, order + rows % per_window
        X = np.asarray(train.X, dtype=np.float64)
        lags = X[window[:, None], hour[:, None] + np.arange(-order, 0)[None, :], :].reshape(len(rows), -1)
        design = np.hstack([lags, np.ones((len(rows), 1))])
        gram = design.T @ design
        gram[:-1, :-1] += self.hparams_.ridge * len(rows) * np.eye(order * F)  # intercept not penalised
        self.coef_ = np.linalg.solve(gram, design.T @ X[window, hour, :])  # (order * F + 1, F)

    def _predict_closed_form(self, X):
        order = self.hparams_.order
        state = X[:, -order:, :].astype(np.float64)
        forecasts = np.empty((len(X), self.horizon_))
        for h in range(self.horizon_):
            next_hour = state.reshape(len(X), -1) @ self.coef_[:-1] + self.coef_[-1]
            forecasts[:, h] = next_hour[:, self.target_index_]
            state = np.concatenate([state[:, 1:], next_hour[:, None, :]], axis=1)
        return forecasts

    def _weights(self):
        return {"coef": self.coef_}

    def _set_weights(self, weights):
        self.coef_ = weights["coef"]
