"""fit.validation_windows: the validation sets every fit is evaluated and selected on (pipeline.train).

non_overlapping (default) evaluates on the windows whose targets do not overlap (the rule itself:
tests/test_windows.py); all evaluates on every window, as every run did before the option existed.
"""

import numpy as np
import pandas as pd
import pytest

from synthetic_clean import START, clean_table, station_table

from pipeline.errors import InputError
from pipeline.fit_config import FitConfig
from pipeline.splits import admitted_target_block, compute_time_blocks, plan_splits
from pipeline.train import _fit, run_seed, station_city_map, subset, validation_sets
from pipeline.windows import ForecastConfig, build_windows, non_overlapping_targets

L, H, STRIDE, HOURS = 12, 6, 2, 500
LAYOUT = {"avel": [("avel_a", 0.0, 0.0), ("avel_b", 0.0, 0.3)], "brum": [("brum_a", 5.0, 5.0)],
          "cosk": [("cosk_a", 9.0, 9.0)]}
FORECAST = {"target": "pm25", "lookback_hours": L, "horizon_hours": H, "stride_hours": STRIDE,
            "fill_limit_hours": 3, "calendar": True, "exclude_features": []}


@pytest.fixture(scope="module")
def setting():
    tables = {city: clean_table([s for s, _, _ in rows], HOURS, seed=i) for i, (city, rows) in enumerate(LAYOUT.items())}
    item = next(i for i in plan_splits({"schemes": ["loco"]}, station_table(LAYOUT), L, H) if i["target"] == "cosk")
    blocks = compute_time_blocks(START, START + HOURS * pd.Timedelta(hours=1), item["blocks"], item["gap_hours"], L + H)
    split = {**item, "time_blocks": blocks,
             "admitted_target_block": admitted_target_block(blocks, item["target_train_fraction"])}
    return split, build_windows(split, tables, ForecastConfig(**FORECAST)), station_city_map(tables)


def job(family: str, validation_windows: str, rules=("target-peek", "source-rotation")) -> dict:
    return {"model_name": family, "model": {"family": family}, "penalty_name": "erm",
            "penalty": {"name": "erm", "weight": 0.0, "warmup_steps": 0, "extra": {}},
            "fit": {"max_steps": 12, "batch_size": 16, "eval_every": 4, "threads": 1,
                    "validation_windows": validation_windows},
            "selection": {"rule": "source-holdout", "also": list(rules)}, "forecast": FORECAST,
            "metrics": {"hourly_exceedance_threshold": 35.0}}


def test_all_reproduces_the_histories_of_fits_on_every_validation_window(setting):
    split, windows, station_city = setting
    every = {"source": windows.val_source, "target": windows.val_target}
    outcome = run_seed(job("linear", "all"), 0, windows, split, station_city)
    # what run_seed did before the option: the fit evaluated on the full validation sets
    before = _fit(job("linear", "all"), 0, windows.train, every)
    assert outcome["model"].history_ == before.history_
    assert outcome["validation_windows"] == {"source": len(windows.val_source), "target": len(windows.val_target)}
    assert validation_sets(windows, job("linear", "all"))["source"] is windows.val_source


def test_non_overlapping_fits_and_selects_on_the_thinned_sets_and_tests_on_every_window(setting):
    split, windows, station_city = setting
    thinned_job = job("linear", "non_overlapping")
    outcome = run_seed(thinned_job, 0, windows, split, station_city)
    model = outcome["model"]
    masks = {name: non_overlapping_targets(getattr(windows, f"val_{name}"), H) for name in ("source", "target")}
    assert outcome["validation_windows"] == {name: int(mask.sum()) for name, mask in masks.items()}
    # stride 2, horizon 6: about one window in three is kept
    assert all(0 < mask.sum() < len(mask) / 2 for mask in masks.values())
    thinned = {name: subset(getattr(windows, f"val_{name}"), mask) for name, mask in masks.items()}
    every_source = windows.val_source
    for entry in model.history_[-2:]:
        model.use_snapshot(entry["step"])
        on_thinned = float(np.mean((model.predict(thinned["source"].X) - thinned["source"].y) ** 2))
        on_every = float(np.mean((model.predict(every_source.X) - every_source.y) ** 2))
        assert entry["val/source/all"] == pytest.approx(on_thinned, rel=1e-5)
        assert entry["val/source/all"] != pytest.approx(on_every, rel=1e-5)
    # the rules' validation scores read the thinned histories; the test predictions cover every test window
    chosen = outcome["chosen"]["target-peek"]
    peek = next(entry["val/target/all"] for entry in model.history_ if entry["step"] == chosen)
    assert outcome["metrics"]["target-peek.selection_score"] == pytest.approx(peek)
    assert all(len(pred) == len(windows.test_target) for pred in outcome["predictions"].values())


def test_closed_form_families_are_scored_on_the_same_thinned_sets(setting):
    split, windows, station_city = setting
    outcome = run_seed(job("ridge", "non_overlapping", rules=("target-peek",)), 0, windows, split, station_city)
    thinned = subset(windows.val_source, non_overlapping_targets(windows.val_source, H))
    expected = float(np.mean((outcome["model"].predict(thinned.X) - thinned.y) ** 2))
    assert outcome["metrics"]["source-holdout.selection_score"] == pytest.approx(expected, rel=1e-6)
    every = run_seed(job("ridge", "all", rules=("target-peek",)), 0, windows, split, station_city)
    assert every["metrics"]["source-holdout.selection_score"] != pytest.approx(expected, rel=1e-6)


def test_an_unknown_mode_is_named():
    with pytest.raises(InputError, match="fit.validation_windows"):
        FitConfig(validation_windows="some")
    assert FitConfig().validation_windows == "non_overlapping"


def test_a_job_slice_from_before_the_key_is_evaluated_on_every_window_as_it_was(setting):
    """A run logged before fit.validation_windows existed (re-trained by `verify`, or checked as a twin)
    keeps its old treatment, not today's default."""
    from pipeline import twins

    _, windows, _ = setting
    old = job("linear", "all")
    del old["fit"]["validation_windows"]
    assert validation_sets(windows, old)["source"] is windows.val_source
    assert twins.treatment(old)["validation_windows"] == "all"
    assert twins.treatment(job("linear", "non_overlapping"))["validation_windows"] == "non_overlapping"
