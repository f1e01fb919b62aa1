"""Words for one time step of a study's cadence, so that every label says its unit of time.

Reads and writes nothing; no config key. A step is given in hours, as the windows carry it
(`Windows.step_hours`: 1 for hourly data, 24 for daily, 1/6 for 10-minute data). The report, the grid
command and the aggregation name horizons ("at day 3 ahead"), axes ("horizon (days ahead)") and the
exceedance event ("daily nox > 100 ug/m3") with these words; an hourly study reads "hour" as before.
"""

from __future__ import annotations

from dataclasses import dataclass

MINUTES_PER_HOUR = 60
MINUTES_PER_DAY = 24 * MINUTES_PER_HOUR
_NAMED = {MINUTES_PER_HOUR: ("hour", "hourly"), MINUTES_PER_DAY: ("day", "daily")}


@dataclass(frozen=True)
class StepWords:
    noun: str  # one step: "hour", "day", "10-min step"
    plural: str  # several steps: "hours", "days", "10-min steps"
    adjective: str  # a value on this cadence: "hourly", "daily", "10-min"

    @property
    def is_day(self) -> bool:
        return self.noun == "day"


def step_words(step_hours: float) -> StepWords:
    """The words of a step of `step_hours` hours: hour, day, or "<n>-min step" / "<n>-h step" otherwise."""
    minutes = round(float(step_hours) * MINUTES_PER_HOUR)  # cadences are whole minutes (pipeline.ingest.cadence)
    if minutes < 1:
        raise ValueError(f"a time step must be at least one minute, got {step_hours!r} h")
    if minutes in _NAMED:
        noun, adjective = _NAMED[minutes]
        return StepWords(noun, f"{noun}s", adjective)
    length = f"{minutes // MINUTES_PER_HOUR}-h" if minutes % MINUTES_PER_HOUR == 0 else f"{minutes}-min"
    return StepWords(f"{length} step", f"{length} steps", length)
