"""Reference forecasts with nothing (or almost nothing) to learn: persistence and seasonal naive.

Reads window sets (only the target column of X is used: `target_index`); writes nothing. Obeys
`model.season_hours` (seasonal_naive; cut in steps of the windows' cadence, `step_hours`). Both ignore
penalties and fit settings (see ClosedFormModel). Both accept `model.level` (pipeline.models.level) so
that one override covers a whole sweep; it does not change their forecasts, which already follow the
window's own level (up to float rounding).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.errors import InputError
from pipeline.models.base import ClosedFormModel, check_positive_ints
from pipeline.models.level import LevelParams


class Persistence(ClosedFormModel):
    """y_hat(t + h) = y(t) for every step h: the last observed target value, repeated H times."""

    family = "persistence"

    @dataclass
    class Params(LevelParams):
        pass

    def _fit_closed_form(self, train) -> None:
        pass  # nothing to learn; the horizon and target column were recorded by _start_fit

    def _predict_closed_form(self, X: np.ndarray) -> np.ndarray:
        last = X[:, -1, self.target_index_]
        return np.repeat(last[:, None], self.horizon_, axis=1)


class SeasonalNaive(ClosedFormModel):
    """y_hat(t + h) = y(t + h - k*m) with k = ceil(h / m): the value one season (m steps) earlier.

    For h <= m this is the observed value m hours before the forecast hour; for h > m the last observed
    season is repeated (common practice, e.g. Hyndman & Athanasopoulos, FPP3 "seasonal naive"). Needs
    lookback >= m. m is `season_hours` in steps of the cadence: 24 h is 24 steps of hourly data, 144 of
    10-min data; a daily study sets 168 (a week, 7 steps).
    """

    family = "seasonal_naive"

    @dataclass
    class Params(LevelParams):
        season_hours: int = 24  # daily cycle of traffic, heating and boundary-layer height

        def __post_init__(self):
            super().__post_init__()
            check_positive_ints(self, "season_hours")

    def _fit_closed_form(self, train) -> None:
        step_hours = float(getattr(train, "step_hours", 1.0))
        steps = self.hparams_.season_hours / step_hours
        if steps != int(steps):
            raise InputError(f"{self.hparams_.season_hours} h is not a whole number of {step_hours:g} h steps",
                             field="model.season_hours")
        self.season_steps_ = int(steps)
        if self.lookback_ < self.season_steps_:
            raise InputError(f"seasonal_naive needs a lookback of at least {self.hparams_.season_hours} hours, "
                             f"got {self.lookback_} steps of {step_hours:g} h", field="forecast.lookback_hours")

    def _weights(self):
        # The season in steps depends on the windows' cadence, so a saved state carries it.
        return {"season_steps": np.array(self.season_steps_, dtype=np.int64)}

    def _set_weights(self, weights) -> None:
        self.season_steps_ = int(weights["season_steps"])

    def _source_positions(self) -> np.ndarray:
        season = self.season_steps_
        steps = np.arange(1, self.horizon_ + 1)
        seasons_back = -(-steps // season)  # ceil(h / m)
        return self.lookback_ - 1 + steps - seasons_back * season

    def _predict_closed_form(self, X: np.ndarray) -> np.ndarray:
        return X[:, self._source_positions(), self.target_index_]
