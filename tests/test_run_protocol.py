"""A run names its protocol (sampling, environment fallback) in its tags and in `shiftgrid show`, and the
grid compares a penalty only with the ERM twin that shares its sampling."""

import numpy as np
import pandas as pd
import pytest

from pipeline import audit, grid_stats
from pipeline.train_job import tags_for

SPLIT = {"split_id": "pairs-aa-to-bb-abc123", "scheme": "pairs", "sources": ["aa"], "target": "bb",
         "environment": "station", "environment_fallback_from": "city", "input_digests": {"aa": "0" * 64}}


def job(penalty: str, sampling: str | None = "pooled") -> dict:
    fit = {"max_steps": 10} if sampling is None else {"max_steps": 10, "sampling": sampling}
    return {"model_name": "linear", "model": {"family": "linear"}, "penalty_name": penalty,
            "penalty": None if penalty == "na" else {"name": penalty, "weight": 1.0, "warmup_steps": 0, "extra": {}},
            "fit": fit, "selection": {"rule": "source-holdout", "also": []}, "forecast": {"target": "pm25"}}


def test_tags_name_the_sampling_and_the_environment_fallback():
    tags = tags_for(SPLIT, job("irm"), 0, "c0de")
    assert tags["sampling"] == "pooled" and tags["environment"] == "station"
    assert tags["environment_fallback_from"] == "city"
    assert tags["forecast_target"] == "pm25"
    assert tags_for(SPLIT, job("erm", sampling=None), 0, "c0de")["sampling"] == "balanced"  # the default
    assert tags_for(SPLIT, job("na"), 0, "c0de")["sampling"] == "na"  # closed-form families draw no batches
    plain = {k: v for k, v in SPLIT.items() if k != "environment_fallback_from"}
    assert "environment_fallback_from" not in tags_for(plain, job("irm"), 0, "c0de")


def show_info(sampling):
    split = {k: SPLIT[k] for k in ("split_id", "scheme", "sources", "target", "environment",
                                   "environment_fallback_from")}
    return {"run_id": "r" * 32, "run_name": "x", "status": "FINISHED", "started": "-", "superseded_by": None,
            "identity": {"split_id": SPLIT["split_id"], "model": "linear", "family": "linear", "penalty": "irm",
                         "seed": "0", "selection_rule": "source-holdout", "selection_label": "source-holdout",
                         "sampling": sampling},
            "split": {**split, "time_blocks": {}, "gap_hours": 7, "target_train_fraction": 0.0},
            "config": {"job": job("irm")}, "data_then": {}, "data_now": {}, "data_changed": [], "git": {},
            "code_digest": "c", "package_digest": "p", "versions": {}, "metrics": {}, "artifacts": [],
            "record_path": None, "record_is_this_run": False, "record_run_id": None}


def test_show_prints_the_sampling_and_the_fallback():
    out = audit.format_show(show_info("pooled"))
    assert "sampling    pooled" in out
    assert "environments: station (fallback from city)" in out
    assert "sampling    balanced (not tagged)" in audit.format_show(show_info(None))  # runs from before the tag


def runs_table(irm_sampling: str) -> pd.DataFrame:
    """One split, model lin: ERM (balanced) and IRM (irm_sampling), two seeds each."""
    rows = []
    for penalty, sampling, values in (("erm", "balanced", (1.0, 1.2)), ("irm", irm_sampling, (0.8, 0.9))):
        for seed, value in enumerate(values):
            rows.append({"split_id": "s1", "sources": "aa+cc", "target": "bb", "model": "lin", "family": "linear",
                         "penalty": penalty, "seed": seed, "run_id": f"{penalty}{seed}", "sampling": sampling,
                         "environment": "city", "source-holdout.target_mae": value,
                         "param.forecast.target": "pm25"})
    return pd.DataFrame(rows)


def test_the_grid_pairs_a_penalty_only_with_the_erm_twin_of_the_same_sampling():
    same = grid_stats.summarise(runs_table("balanced"), "mae", "source-holdout").set_index("penalty")
    assert same.loc["irm", "vs_erm_change"] == pytest.approx((0.85 - 1.1) / 1.1)  # (penalty - ERM) / |ERM|
    assert {"sampling", "environment"} <= set(same.columns)
    mixed = grid_stats.summarise(runs_table("pooled"), "mae", "source-holdout").set_index("penalty")
    assert np.isnan(mixed.loc["irm", "vs_erm_change"])  # no twin: batches drawn differently
    assert mixed.loc["irm", "sampling"] == "pooled" and mixed.loc["erm", "sampling"] == "balanced"
