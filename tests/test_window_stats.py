"""Per-origin statistics of the grid: intervals reproduce the logged metrics, DM pairs windows and keeps gaps."""

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.multitest import multipletests

from pipeline import metrics, window_stats
from pipeline.stats import diebold_mariano, dm_lag_order

HORIZON, STRIDE = 6, 3
SCALES = {"s1": 2.0, "s2": 5.0}
RULE = "source-holdout"


def predictions(seed: int, bias: float = 0.0) -> pd.DataFrame:
    """Windows of 2 stations every 3 h; origin 7 is missing for both, s2 also lacks origins 0-4."""
    rng = np.random.default_rng(seed)
    origins = pd.date_range("2024-05-01", periods=30, freq=f"{STRIDE}h", tz="UTC").delete(7)
    frames = []
    for station, skip in (("s1", 0), ("s2", 5)):
        frame = pd.DataFrame({"station_id": station, "origin": origins[skip:], "selection": RULE,
                              "naive_scale": SCALES[station]})
        for h in range(1, HORIZON + 1):
            y = rng.normal(30, 8, len(frame))
            frame[f"y_h{h:02d}"] = y
            frame[f"p_h{h:02d}"] = y + bias + rng.normal(0, 2 + h / 3, len(frame))
        frames.append(frame)
    return pd.concat(frames, ignore_index=True)


def logged_scores(frame: pd.DataFrame) -> dict:
    """What pipeline.train logs for one run: pipeline.metrics on the (n, H) arrays."""
    y = frame[[f"y_h{h:02d}" for h in range(1, HORIZON + 1)]].to_numpy()
    p = frame[[f"p_h{h:02d}" for h in range(1, HORIZON + 1)]].to_numpy()
    return {"mae": metrics.mae(y, p), "mse": metrics.mse(y, p), "rmse": metrics.rmse(y, p),
            "mase": metrics.mase_over_stations(y, p, frame["station_id"].to_numpy(), SCALES)}


@pytest.mark.parametrize("metric", window_stats.INTERVAL_METRICS)
def test_interval_point_is_the_cell_mean_of_the_logged_metric_and_lies_inside(metric):
    frames = [predictions(seed) for seed in (0, 1, 2)]
    errors = [window_stats.window_errors(f, RULE) for f in frames]
    result = window_stats.cell_intervals(errors, HORIZON, STRIDE, n_boot=400)[metric]
    cell_mean = np.mean([logged_scores(f)[metric] for f in frames])  # the grid's cell mean over seeds
    assert result["point"] == pytest.approx(cell_mean, rel=1e-10)
    assert result["ci_low"] < cell_mean < result["ci_high"]
    assert result["ci_origins"] == 30  # the stride grid keeps the missing origin 7 as an empty row
    assert result["ci_block"] >= HORIZON // STRIDE


def test_only_metrics_with_a_per_window_form_get_an_interval_and_an_empty_seed_gives_none():
    errors = [window_stats.window_errors(predictions(0), RULE)]
    assert set(window_stats.cell_intervals(errors, HORIZON, STRIDE, 100)) == {"mae", "mse", "rmse", "mase"}
    empty = errors[0].iloc[:0]
    assert np.isnan(window_stats.cell_intervals([errors[0], empty], HORIZON, STRIDE, 100)["mae"]["ci_low"])


def test_paired_dm_uses_the_window_overlap_and_keeps_missing_origins_apart():
    penalised = [window_stats.window_errors(predictions(seed, bias=-0.5), RULE) for seed in (10, 11)]
    erm = [window_stats.window_errors(predictions(seed, bias=1.0), RULE) for seed in (20, 21)]
    result = window_stats.paired_dm(penalised, erm, "absolute", HORIZON, STRIDE)
    assert result["dm_lags"] == dm_lag_order(HORIZON, STRIDE) == 1
    # by hand: seed-mean per-window MAE, difference per window, mean over stations per origin
    def seed_mean(frames):
        return pd.concat([f["abs_sum"] / f["count"] for f in frames], axis=1).mean(axis=1)
    diff = (seed_mean(penalised) - seed_mean(erm)).groupby(level="origin").mean().sort_index()
    positions = ((diff.index - diff.index[0]) // pd.Timedelta(hours=STRIDE)).to_numpy()
    assert 7 not in positions and positions[-1] == 29  # the dropped origin is a gap, not contiguity
    expected = diebold_mariano(diff.to_numpy(), 1, positions=positions)
    assert result["dm_p"] == pytest.approx(expected.p_value) and result["dm_n"] == 29
    assert result["dm_mean_diff"] < 0 and result["dm_stat"] < 0  # negative = the penalty has smaller error


def test_holm_over_every_comparison_of_a_rule_and_loss():
    # statsmodels.stats.multitest.multipletests(method="holm") per family (rule x loss)
    dm = pd.DataFrame({"selection_rule": ["a", "a", "a", "b", "b", "a"],
                       "dm_loss": ["absolute"] * 5 + ["squared"],
                       "dm_p": [0.01, 0.04, 0.03, 0.2, 0.001, 0.04]})
    adjusted = window_stats.holm_by_family(dm)
    np.testing.assert_allclose(adjusted[:3], multipletests([0.01, 0.04, 0.03], method="holm")[1])
    np.testing.assert_allclose(adjusted[3:5], multipletests([0.2, 0.001], method="holm")[1])
    assert adjusted[5] == pytest.approx(0.04)  # a family of one


def test_window_errors_skip_nan_pairs_and_pick_the_loss():
    frame = predictions(0)
    frame.loc[0, "p_h02"] = np.nan
    errors = window_stats.window_errors(frame, RULE)
    assert errors["count"].iloc[0] == HORIZON - 1 and errors["count"].iloc[1] == HORIZON
    first = errors.iloc[0]
    assert window_stats.window_loss(errors, "scaled_absolute").iloc[0] == pytest.approx(
        first["abs_sum"] / first["count"] / SCALES["s1"])
    assert window_stats.loss_for("rmse") == "squared" and window_stats.loss_for("csi") == "absolute"
