"""Forecast scores against published worked examples and scikit-learn."""

import numpy as np
import pytest
from sklearn.metrics import mean_absolute_error, mean_squared_error

from pipeline.errors import InputError
from pipeline.metrics import (EXCEEDANCE_KEYS, HEADLINE_KEYS, exceedance, forecast_scores, mae,
                              mase, mase_over_stations, mse, per_horizon, rmse, seasonal_naive_scale)

# Worked example computed with numpy (Hyndman & Koehler 2006, IJF 22(4); seasonal scale: FPP3)
TRAIN = np.array([10, 14, 8, 12, 11, 16, 9, 13, 13, 15, 10, 16], dtype=float)
TEST = np.array([14, 18, 11, 15], dtype=float)
FORECAST = np.array([12, 17, 12, 14], dtype=float)


def test_mase_worked_example_hyndman_koehler():
    # Hyndman & Koehler (2006) IJF 22(4) definition, values computed with numpy: MAE 1.25,
    # MASE 0.3125 (m = 1), 0.833333 (m = 4); scale = in-sample naive MAE of the TRAINING series
    assert mae(TEST, FORECAST) == pytest.approx(1.25)
    assert mase(TEST, FORECAST, seasonal_naive_scale(TRAIN, m=1)) == pytest.approx(0.3125)
    assert mase(TEST, FORECAST, seasonal_naive_scale(TRAIN, m=4)) == pytest.approx(0.833333, abs=1e-6)


def test_mase_scales_each_station_by_its_own_training_series_then_averages_stations():
    # Hyndman & Koehler (2006): each series is scaled by its own in-sample naive MAE; computed with numpy.
    # Station A is the worked example (MASE 0.3125 with m = 1); station B is A doubled, so its errors and
    # its scale double and its MASE is the same 0.3125, while a pooled scale would mix the two.
    y = np.concatenate([TEST, 2 * TEST])
    yhat = np.concatenate([FORECAST, 2 * FORECAST])
    stations = np.array(["a"] * 4 + ["b"] * 4, dtype=object)
    scales = {"a": seasonal_naive_scale(TRAIN, m=1), "b": seasonal_naive_scale(2 * TRAIN, m=1)}
    assert scales == {"a": pytest.approx(4.0), "b": pytest.approx(8.0)}
    assert mase_over_stations(y, yhat, stations, scales) == pytest.approx(0.3125)
    # the plain mean over stations, not over pairs: 3 extra windows at station a do not outweigh b
    uneven = np.concatenate([TEST, TEST[:3], 2 * TEST])
    uneven_hat = np.concatenate([FORECAST, TEST[:3] + 4.0, 2 * FORECAST])
    labels = np.array(["a"] * 7 + ["b"] * 4, dtype=object)
    station_a = mae(uneven[:7], uneven_hat[:7]) / 4.0
    assert mase_over_stations(uneven, uneven_hat, labels, scales) == pytest.approx((station_a + 0.3125) / 2)
    # a station whose scale is undefined is left out; a station without a scale is an error
    assert mase_over_stations(y, yhat, stations, {"a": 4.0, "b": float("nan")}) == pytest.approx(0.3125)
    with pytest.raises(InputError, match="no MASE scale"):
        mase_over_stations(y, yhat, stations, {"a": 4.0})


def test_naive_scale_of_one_series_skips_nan_pairs():
    # the NaN at t=2 removes two differences; the remaining ones are |2-0| = 2 and |5-3| = 2
    series = np.array([0.0, 2.0, np.nan, 3.0, 5.0])
    assert seasonal_naive_scale(series, m=1) == pytest.approx(2.0)
    # a series shorter than the period has no pair: NaN
    assert np.isnan(seasonal_naive_scale(np.array([1.0, 2.0]), m=24))
    with pytest.raises(InputError):
        seasonal_naive_scale(series, m=0)
    with pytest.raises(InputError):
        seasonal_naive_scale(np.ones((2, 3)), m=1)


def test_mase_undefined_for_zero_scale_and_rejects_negative_scale():
    assert np.isnan(mase(TEST, FORECAST, 0.0))
    with pytest.raises(InputError):
        mase(TEST, FORECAST, -1.0)


def test_mse_rmse_mae_match_scikit_learn_on_random_data():
    rng = np.random.default_rng(7)
    y, yhat = rng.normal(size=500), rng.normal(size=500)
    # scikit-learn reference implementations (sklearn.metrics)
    assert mse(y, yhat) == pytest.approx(mean_squared_error(y, yhat), rel=1e-12)
    assert rmse(y, yhat) == pytest.approx(np.sqrt(mean_squared_error(y, yhat)), rel=1e-12)
    assert mae(y, yhat) == pytest.approx(mean_absolute_error(y, yhat), rel=1e-12)


def test_nan_pairs_are_skipped_consistently():
    rng = np.random.default_rng(3)
    y, yhat = rng.normal(size=100), rng.normal(size=100)
    y_gappy, yhat_gappy = y.copy(), yhat.copy()
    y_gappy[:10] = np.nan
    yhat_gappy[10:15] = np.nan
    keep = np.arange(100) >= 15
    # scikit-learn on the complete pairs only (sklearn.metrics)
    assert mse(y_gappy, yhat_gappy) == pytest.approx(mean_squared_error(y[keep], yhat[keep]))
    assert mae(y_gappy, yhat_gappy) == pytest.approx(mean_absolute_error(y[keep], yhat[keep]))
    assert np.isnan(mae([np.nan], [1.0]))
    with pytest.raises(InputError):
        mae(np.zeros(3), np.zeros(4))


def _contingency_arrays(a, b, c, d, threshold=35.0):
    above, below = threshold + 5.0, threshold - 5.0
    y = np.array([above] * a + [below] * b + [above] * c + [below] * d)
    yhat = np.array([above] * a + [above] * b + [below] * c + [below] * d)
    return y, yhat


def test_exceedance_scores_jolliffe_stephenson_table():
    # Jolliffe & Stephenson (2012) ch. 3, values computed: a=30, b=10, c=20, d=140
    y, yhat = _contingency_arrays(30, 10, 20, 140)
    table = exceedance(y, yhat, threshold=35.0)
    assert set(table) == set(EXCEEDANCE_KEYS)
    assert (table["hits"], table["false_alarms"], table["misses"],
            table["correct_negatives"]) == (30, 10, 20, 140)
    assert table["pod"] == pytest.approx(0.6)
    assert table["far"] == pytest.approx(0.25)
    assert table["csi"] == pytest.approx(0.5)
    assert table["ets"] == pytest.approx(0.4)
    assert table["bias"] == pytest.approx(0.8)


def test_exceedance_is_strictly_above_threshold_and_nan_when_no_event():
    # a value equal to the threshold is not an exceedance
    table = exceedance([35.0, 36.0], [35.0, 36.0], threshold=35.0)
    assert (table["hits"], table["correct_negatives"]) == (1, 1)
    calm = exceedance([1.0, 2.0, np.nan], [1.0, 2.0, 50.0], threshold=35.0)
    assert calm["correct_negatives"] == 2  # the NaN pair is skipped, not a false alarm
    assert np.isnan(calm["pod"]) and np.isnan(calm["far"]) and np.isnan(calm["bias"])
    assert np.isnan(calm["csi"]) and np.isnan(calm["ets"])


def test_per_horizon_and_forecast_scores():
    rng = np.random.default_rng(11)
    y = rng.gamma(2.0, 10.0, size=(60, 3))
    yhat = y + rng.normal(scale=[1.0, 2.0, 4.0], size=(60, 3))
    steps = per_horizon(y, yhat, mae)
    assert steps.shape == (3,)
    # error grows with the noise scale of each step
    assert steps[0] < steps[1] < steps[2]
    for step in range(3):
        assert steps[step] == pytest.approx(mean_absolute_error(y[:, step], yhat[:, step]))
    stations = np.array(["s"] * 60, dtype=object)
    scores = forecast_scores(y, yhat, stations, {"s": 2.5}, threshold=25.0)
    assert list(scores)[:len(HEADLINE_KEYS)] == list(HEADLINE_KEYS)
    assert [key for key in scores if key.startswith("mae_h")] == ["mae_h01", "mae_h02", "mae_h03"]
    assert all(isinstance(value, float) for value in scores.values())
    assert scores["mae"] == pytest.approx(steps.mean())  # equal counts per step
    assert scores["mase"] == pytest.approx(scores["mae"] / 2.5)
    assert scores["rmse"] == pytest.approx(np.sqrt(mean_squared_error(y.ravel(), yhat.ravel())))
    assert scores["pod"] == exceedance(y, yhat, 25.0)["pod"]
    with pytest.raises(InputError):
        per_horizon(y, yhat[:, :2], mae)
