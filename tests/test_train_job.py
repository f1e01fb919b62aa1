"""The training job on tiny synthetic tables: run records, MLflow runs, superseding and reuse."""

import json

import numpy as np
import pytest

from synthetic_clean import clean_table, station_table

from pipeline.splits import build_split, plan_splits, write_split
from pipeline.tracking import SUPERSEDED_TAG, artifact_location, client_for, setup_store
from pipeline.train_job import run_train_job

FIT_SETTINGS = {"max_steps": 10, "batch_size": 16, "lr": 1e-3, "weight_decay": 0.0, "eval_every": 5, "patience": 8,
           "grad_clip": 1.0, "threads": 1}
FORECAST = {"target": "pm25", "lookback_hours": 24, "horizon_hours": 6, "stride_hours": 4, "fill_limit_hours": 3,
            "calendar": True, "exclude_features": []}


def job(model: str, params: dict, penalty: str = "na") -> dict:
    return {"model_name": model, "model": {"family": model, **params}, "penalty_name": penalty,
            "penalty": None if penalty == "na" else {"name": penalty, "weight": 1.0, "warmup_steps": 0, "extra": {}},
            "fit": FIT_SETTINGS, "selection": {"rule": "source-holdout", "also": ["target-peek"]},
            "forecast": FORECAST, "metrics": {"hourly_exceedance_threshold": 35.0}}


@pytest.fixture(scope="module")
def setting(tmp_path_factory):
    folder = tmp_path_factory.mktemp("job")
    stations = station_table({"aa": [("aa_1", 48.0, 10.0)], "bb": [("bb_1", 48.5, 10.5)],
                              "cc": [("cc_1", 49.0, 11.0)]})
    paths = {}
    for seed, city in enumerate(["aa", "bb", "cc"]):
        table = clean_table(list(stations[stations.city == city].station_id), 24 * 10, seed=seed)
        paths[city] = folder / f"{city}.parquet"
        table.to_parquet(paths[city])
    plan = plan_splits({"schemes": ["loco"]}, stations, 24, 6)[0]
    record = build_split(plan, {c: str(paths[c]) for c in [*plan["sources"], plan["target"]]}, 24, 6)
    write_split(record, folder / "split.json")
    uri = f"sqlite:///{folder}/mlflow.db"
    setup_store(uri, "unit", artifact_location(folder))
    return folder, uri


def test_unchanged_units_are_reused_and_changed_ones_retrain_and_supersede(setting):
    folder, uri = setting
    units = [{"job": job("persistence", {}), "seed": 0}, {"job": job("ridge", {"alpha": 1.0}), "seed": 0}]
    first = run_train_job(folder / "split.json", units, [folder / "p.json", folder / "r.json"], uri, "unit", "c1")
    assert [r["reused"] for r in first] == [False, False]
    units[1] = {"job": job("ridge", {"alpha": 5.0}), "seed": 0}  # one hyperparameter of one model changed
    second = run_train_job(folder / "split.json", units, [folder / "p.json", folder / "r.json"], uri, "unit", "c1")
    assert second[0]["reused"] and second[0]["run_id"] == first[0]["run_id"]  # persistence: not retrained
    assert not second[1]["reused"] and second[1]["run_id"] != first[1]["run_id"]
    assert second[1]["supersedes"] == [first[1]["run_id"]]
    client = client_for(uri)
    assert client.get_run(first[1]["run_id"]).data.tags[SUPERSEDED_TAG] == second[1]["run_id"]
    assert SUPERSEDED_TAG not in client.get_run(first[0]["run_id"]).data.tags
    assert json.loads((folder / "r.json").read_text())["run_id"] == second[1]["run_id"]


def test_without_reuse_every_unit_retrains_deterministically(setting):
    folder, uri = setting
    units = [{"job": job("linear", {}, penalty="irm"), "seed": 3}]
    first = run_train_job(folder / "split.json", units, [folder / "l1.json"], uri, "unit", "c1", supersede=False)
    again = run_train_job(folder / "split.json", units, [folder / "l2.json"], uri, "unit", "c1", supersede=False,
                          reuse=False)
    assert again[0]["run_id"] != first[0]["run_id"]
    assert again[0]["metrics"] == first[0]["metrics"]  # same seed, same machine: identical results


def test_seeds_trained_together_log_what_each_seed_logs_alone(setting, monkeypatch):
    from pipeline import ensemble

    folder, uri = setting
    fits_together = []
    real = ensemble.train_ensemble
    monkeypatch.setattr(ensemble, "train_ensemble", lambda *args: fits_together.append(args[-1]) or real(*args))
    units = [{"job": job("linear", {}, penalty="vrex"), "seed": seed} for seed in (0, 1, 2)]
    together = run_train_job(folder / "split.json", units, [folder / f"t{s}.json" for s in (0, 1, 2)], uri, "unit",
                             "c1", supersede=False, reuse=False)  # one job: the three seeds as one ensemble
    assert fits_together == [[0, 1, 2]]
    client = client_for(uri)
    timings = {"fit_seconds", "compute_seconds", "prepare_seconds"}
    for unit, record in zip(units, together):
        alone = run_train_job(folder / "split.json", [unit], [folder / "alone.json"], uri, "unit", "c1",
                              supersede=False, reuse=False)[0]
        logged, logged_alone = (client.get_run(r["run_id"]).data.metrics for r in (record, alone))
        # exact equality, NaN equal to NaN (undefined exceedance scores)
        np.testing.assert_equal({k: v for k, v in logged.items() if k not in timings},
                                {k: v for k, v in logged_alone.items() if k not in timings})
    assert len({record["metrics"]["target_mae"] for record in together}) == 3  # the seeds differ


def test_the_run_params_name_the_validation_windows_and_their_counts(setting):
    folder, uri = setting
    client = client_for(uri)
    counts, test_windows = {}, set()
    for mode in ("non_overlapping", "all"):
        unit = job("ridge", {"alpha": 1.0})
        unit["fit"] = {**FIT_SETTINGS, "validation_windows": mode}
        record = run_train_job(folder / "split.json", [{"job": unit, "seed": 0}], [folder / f"v_{mode}.json"], uri,
                               "unit", "c1", supersede=False, reuse=False)[0]
        params = client.get_run(record["run_id"]).data.params
        assert params["fit.validation_windows"] == mode
        counts[mode] = (int(params["n_val_source_windows"]), int(params["n_val_target_windows"]))
        test_windows.add(params["n_test_windows"])
    # stride 4 h, horizon 6 h: every other window is kept; the test metrics use every window either way
    assert all(0 < thin < every for thin, every in zip(counts["non_overlapping"], counts["all"]))
    assert len(test_windows) == 1
