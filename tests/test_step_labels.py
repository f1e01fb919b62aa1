"""Labels say the unit of time of the study's cadence (pipeline.step_words): an hourly study reads as
before, a daily or 10-minute one names its own step in horizons, axes, captions and the exceedance event.

Unit-level: hand-made run tables as the aggregation writes them (grid.parquet columns), no MLflow.
"""

import matplotlib
import pandas as pd
import pytest

from pipeline import grid_stats
from pipeline.errors import InputError
from pipeline.report import figures
from pipeline.report.html import curves_section
from pipeline.step_words import step_words

matplotlib.use("Agg")
RULE = "source-holdout"


def runs_table(horizon_hours: float, steps: int, variable: str = "nox") -> pd.DataFrame:
    """Two runs of one split as grid.parquet holds them: horizon metrics per step, scores, logged params."""
    rows = []
    for penalty, mae in (("erm", 30.0), ("irm", 33.0)):
        row = {"split_id": "loco-a-to-b", "sources": "a", "target": "b", "model": "lin", "penalty": penalty,
               "seed": 0, "param.forecast.target": variable, "param.forecast.horizon_hours": str(horizon_hours),
               "param.metrics.hourly_exceedance_threshold": "100.0"}
        for step in range(1, steps + 1):
            row[f"{RULE}.target_mae_h{step:02d}"] = row[f"target_mae_h{step:02d}"] = mae + step
        row.update({f"{RULE}.target_{score}": 0.5 for score in ("pod", "far", "csi", "ets")})
        rows.append(row)
    return pd.DataFrame(rows)


@pytest.mark.parametrize("step_hours, noun, plural, adjective", [
    (1.0, "hour", "hours", "hourly"), (24.0, "day", "days", "daily"), (1 / 6, "10-min step", "10-min steps", "10-min"),
    (0.25, "15-min step", "15-min steps", "15-min"), (6.0, "6-h step", "6-h steps", "6-h")])
def test_each_cadence_has_its_words(step_hours, noun, plural, adjective):
    words = step_words(step_hours)
    assert (words.noun, words.plural, words.adjective) == (noun, plural, adjective)


def test_a_step_under_a_minute_is_refused():
    with pytest.raises(ValueError, match="at least one minute"):
        step_words(0.001)


def test_hourly_labels_read_exactly_as_before():
    # the strings an hourly study showed before the cadence existed (tests/test_report.py checks the page)
    assert grid_stats.metric_label("target_mae_h03", "pm25") == "MAE of pm25 at hour 3 ahead, ug/m3"
    assert grid_stats.metric_label("target_csi", "pm25", 35.0) == \
        "CSI of hourly pm25 > 35 ug/m3 (no unit; research scoring threshold)"
    assert grid_stats.threshold_note("pm25", 35.0) == ("research scoring threshold: hourly pm25 above 35 ug/m3, "
                                                       "applied to each hourly value (no 24-h mean is formed; "
                                                       "not an alert level)")


def test_daily_and_ten_minute_labels_name_their_step():
    assert grid_stats.metric_label("target_mae_h03", "nox", step_hours=24) == "MAE of nox at day 3 ahead, ug/m3"
    assert grid_stats.metric_label("source-holdout.target_mae_h02", "pm25", step_hours=1 / 6) == \
        "MAE of pm25 at 10-min step 2 ahead, ug/m3"
    assert grid_stats.metric_label("target_pod", "nox", 100.0, step_hours=24) == \
        "POD of daily nox > 100 ug/m3 (no unit; research scoring threshold)"
    note = grid_stats.threshold_note("nox", 100.0, step_hours=24)
    assert note.startswith("research scoring threshold: daily nox above 100 ug/m3, applied to each daily value")
    assert "hour" not in note and "24-h mean is formed" not in note


@pytest.mark.parametrize("horizon_hours, steps, expected", [(3, 3, 1.0), (72, 3, 24.0), (3, 18, 1 / 6),
                                                            (6, 24, 0.25)])
def test_the_step_is_read_from_the_horizon_and_its_per_step_metrics(horizon_hours, steps, expected):
    assert grid_stats.run_step_hours(runs_table(horizon_hours, steps)) == pytest.approx(expected)


def test_a_table_without_horizon_metrics_or_param_reads_hourly():
    runs = runs_table(72, 3)
    assert grid_stats.run_step_hours(runs.drop(columns="param.forecast.horizon_hours")) == 1.0
    assert grid_stats.run_step_hours(runs[[c for c in runs.columns if "_mae_h" not in c]]) == 1.0


def test_runs_of_different_horizons_are_a_one_line_error():
    runs = runs_table(72, 3)
    runs.loc[1, "param.forecast.horizon_hours"] = "48"
    with pytest.raises(InputError, match="forecast.horizon_hours"):
        grid_stats.run_step_hours(runs)


def test_grid_label_of_a_daily_study_says_day():
    assert grid_stats.grid_metric_label(runs_table(72, 3), "target_mae_h02") == "MAE of nox at day 2 ahead, ug/m3"
    assert grid_stats.grid_metric_label(runs_table(72, 3), "target_csi").startswith("CSI of daily nox > 100 ug/m3")


def test_report_horizon_axis_caption_and_event_follow_the_cadence():
    daily = runs_table(72, 3)
    figure = figures.horizon_curves(daily, RULE, "nox", step_hours=24)
    assert {ax.get_xlabel() for ax in figure.axes if ax.get_visible()} == {"horizon (days ahead)"}
    html = str(curves_section(daily, RULE, dpi=40))
    assert "per forecast day" in html and "daily nox above 100 ug/m3, applied to each daily value" in html
    assert "hourly" not in html and "forecast hour" not in html
    hourly = str(curves_section(runs_table(3, 3, "pm25"), RULE, dpi=40))
    assert "per forecast hour" in hourly and "hourly pm25 above 100 ug/m3" in hourly
