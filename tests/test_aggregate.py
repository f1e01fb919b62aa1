"""Aggregation on a hand-made MLflow store with known answers (tests/grid_fixture.py)."""

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps
from statsmodels.stats.multitest import multipletests

from grid_fixture import SPLIT_IDS, build_grid_store
from pipeline import grid_stats, stats, tracking
from pipeline.aggregate import aggregate, collect_runs, window_tables
from pipeline.errors import InputError
from pipeline.stats import diebold_mariano


@pytest.fixture(scope="module")
def grid(tmp_path_factory):
    root = tmp_path_factory.mktemp("grid")
    records, uri = build_grid_store(root)
    meta = aggregate(records, root / "results", metric="mae", n_boot=500)
    summary = pd.read_csv(root / "results" / "grid.csv")
    return {"root": root, "records": records, "uri": uri, "meta": meta, "summary": summary,
            "runs": pd.read_parquet(root / "results" / "grid.parquet")}


def test_the_trials_behind_searched_runs_are_listed_and_the_grid_holds_only_their_parents(grid):
    # lin+irm: 3 splits x 2 seeds searched weights 100 (selected) and 10 (target MAE 0.3 higher)
    trials = pd.read_csv(grid["root"] / "results" / "grid_trials.csv")
    assert len(trials) == 12 and grid["meta"]["n_trials"] == 12
    assert set(trials["parent_run_id"]) == set(grid["runs"].query("penalty == 'irm'")["run_id"])
    assert not set(trials["run_id"]) & set(grid["runs"]["run_id"])
    chosen = trials[trials["search.penalty.weight"] == 100.0]
    assert (chosen["selected_by"] == "source-holdout;target-peek").all() and trials["selected_by"].isna().sum() == 6
    parents = grid["runs"].set_index("run_id")["source-holdout.target_mae"]
    gap = trials["source-holdout.target_mae"] - trials["parent_run_id"].map(parents)
    assert np.allclose(gap[trials["search.penalty.weight"] == 100.0], 0.0)
    assert np.allclose(gap[trials["search.penalty.weight"] == 10.0], 0.3)


def cell(summary, split_id, combo, rule="source-holdout"):
    rows = summary[(summary.split_id == split_id) & (summary.combo == combo) & (summary.selection_rule == rule)]
    assert len(rows) == 1
    return rows.iloc[0]


def test_one_row_per_run_with_metrics_and_tags(grid):
    runs = grid["runs"]
    assert len(runs) == 15 and runs["run_id"].is_unique
    assert {"source-holdout.target_mae", "target-peek.target_mae_h03", "tag.code_digest", "param.metrics."
            "hourly_exceedance_threshold", "param.forecast.target"} <= set(runs.columns)
    assert grid["meta"]["rules"] == ["source-holdout", "target-peek"]


def test_means_spread_and_ranks_have_the_known_answers(grid):
    summary = grid["summary"]
    erm = cell(summary, SPLIT_IDS[0], "lin+erm")
    assert erm["mean"] == pytest.approx(1.1) and erm["std"] == pytest.approx(np.std([1.0, 1.2], ddof=1))
    # two seeds: their min-max, called the seed range, never a confidence interval
    assert erm["n_seeds"] == 2 and (erm["seed_low"], erm["seed_high"], erm["seed_interval"]) == (1.0, 1.2, "seed range")
    assert erm["metric_label"] == "MAE of pm25, ug/m3"
    assert cell(summary, SPLIT_IDS[0], "persistence+n/a")["n_seeds"] == 1
    # ranks inside each split, lower MAE = rank 1
    assert [cell(summary, SPLIT_IDS[0], c)["rank"] for c in ("lin+irm", "lin+erm", "persistence+n/a")] == [1, 2, 3]
    assert [cell(summary, SPLIT_IDS[1], c)["rank"] for c in ("persistence+n/a", "lin+erm", "lin+irm")] == [1, 2, 3]
    assert cell(summary, SPLIT_IDS[2], "lin+irm")["mean_rank"] == pytest.approx(5 / 3)
    assert cell(summary, SPLIT_IDS[2], "persistence+n/a")["mean_rank"] == pytest.approx(7 / 3)
    # the peek is 0.1 lower everywhere and labelled as an upper bound
    peek = cell(summary, SPLIT_IDS[0], "lin+erm", "target-peek")
    assert peek["mean"] == pytest.approx(1.0) and "upper bound" in peek["selection_label"]


def test_penalty_against_erm_twin(grid):
    summary = grid["summary"]
    changes = [cell(summary, split, "lin+irm")["vs_erm_change"] for split in SPLIT_IDS]
    assert changes == pytest.approx([(1.0 - 1.1) / 1.1, (2.3 - 2.0) / 2.0, (0.6 - 1.0) / 1.0])
    irm = cell(summary, SPLIT_IDS[0], "lin+irm")
    assert (irm["vs_erm_wins"], irm["vs_erm_ties"], irm["vs_erm_losses"]) == (2, 0, 1)
    assert np.isnan(cell(summary, SPLIT_IDS[0], "lin+erm")["vs_erm_change"])


def artifact_errors(runs, split_id, model, penalty, rule="source-holdout"):
    """Per-window absolute errors of every seed of one cell, read straight from the predictions artifacts."""
    frames = []
    for row in runs[(runs.split_id == split_id) & (runs.model == model) & (runs.penalty == penalty)].itertuples():
        frame = pd.read_parquet(f"{row.artifact_uri[len('file://'):]}/predictions/target_predictions.parquet")
        frames.append(frame[frame.selection == rule])
    return frames


def test_diebold_mariano_recomputed_from_the_artifacts(grid):
    runs = grid["runs"]

    def losses(model, penalty):
        frames = []
        for frame in artifact_errors(runs, SPLIT_IDS[2], model, penalty):
            errors = np.mean([np.abs(frame[f"y_h0{h}"] - frame[f"p_h0{h}"]) for h in (1, 2, 3)], axis=0)
            frames.append(pd.Series(errors, index=[frame.station_id, frame.origin]))
        return pd.concat(frames, axis=1).mean(axis=1)

    d = (losses("lin", "irm") - losses("lin", "erm")).groupby(level=1).mean().sort_index()
    # hourly origins, horizon 3 h: windows up to 2 origins apart overlap, so 2 Bartlett lags
    expected = diebold_mariano(d.to_numpy(), 2)
    dm = pd.read_csv(grid["root"] / "results" / "grid_dm.csv")
    chosen = (dm.split_id == SPLIT_IDS[2]) & (dm.selection_rule == "source-holdout") & (dm.dm_loss == "absolute")
    row = dm[chosen].iloc[0]
    assert row["dm_n"] == 40 and row["dm_lags"] == 2
    assert row["dm_hln"] == pytest.approx(expected.hln_statistic) and row["dm_p"] == pytest.approx(expected.p_value)
    assert row["dm_hln"] < 0  # irm's errors are built smaller on this split
    assert cell(grid["summary"], SPLIT_IDS[2], "lin+irm")["dm_p"] == pytest.approx(expected.p_value)


def test_holm_family_is_every_penalised_comparison_of_a_rule(grid):
    # statsmodels.stats.multitest.multipletests(method="holm") over the 3 lin+irm vs lin+erm tests of the rule
    dm = pd.read_csv(grid["root"] / "results" / "grid_dm.csv")
    family = dm[(dm.selection_rule == "source-holdout") & (dm.dm_loss == "absolute")]
    assert len(family) == 3
    np.testing.assert_allclose(family["dm_p_holm"], multipletests(family["dm_p"], method="holm")[1])
    summary = grid["summary"]
    irm = summary[(summary.combo == "lin+irm") & (summary.selection_rule == "source-holdout")]
    assert set(irm["dm_loss"]) == {"absolute"}  # the loss that matches the grid metric (mae)
    assert (irm["dm_p_holm"] >= irm["dm_p"]).all()


def test_cells_carry_a_block_bootstrap_interval_over_test_origins(grid):
    intervals = pd.read_csv(grid["root"] / "results" / "grid_intervals.csv")
    assert set(intervals["metric"]) == {"mae", "mse", "rmse", "mase"}
    erm = intervals[(intervals.split_id == SPLIT_IDS[0]) & (intervals.model == "lin") & (intervals.penalty == "erm")
                    & (intervals.selection_rule == "source-holdout") & (intervals.metric == "mae")].iloc[0]
    # the point is the seed-mean MAE of the artifacts' windows; blocks >= ceil(3 h / 1 h) origins
    seeds = [np.mean(np.abs(np.concatenate([f[f"y_h0{h}"] - f[f"p_h0{h}"] for h in (1, 2, 3)])))
             for f in artifact_errors(grid["runs"], SPLIT_IDS[0], "lin", "erm")]
    assert erm["point"] == pytest.approx(np.mean(seeds), rel=1e-6)
    assert erm["ci_low"] < erm["point"] < erm["ci_high"] and erm["ci_block"] >= 3 and erm["ci_origins"] == 40
    row = cell(grid["summary"], SPLIT_IDS[0], "lin+erm")
    assert (row["ci_low"], row["ci_high"]) == pytest.approx((erm["ci_low"], erm["ci_high"]))


def test_friedman_iman_davenport_and_nemenyi_over_target_cities(grid):
    result = grid["meta"]["friedman"]["source-holdout"]
    table = pd.DataFrame({split: {combo: mean for combo, mean in grid["summary"].query(
        "split_id == @split and selection_rule == 'source-holdout'")[["combo", "mean"]].itertuples(index=False)}
        for split in SPLIT_IDS}).T
    reference = sps.friedmanchisquare(*[table[c] for c in table.columns])  # scipy as the outside reference
    assert result["chi2"] == pytest.approx(reference.statistic) and result["chi2"] == pytest.approx(2 / 3)
    assert result["p_value"] == pytest.approx(reference.pvalue)
    # Demsar (2006) Table 5: q_0.05 = 2.343 for k = 3; CD = q sqrt(k(k+1)/(6N)), N = 3
    assert result["cd"] == pytest.approx(2.343 * np.sqrt(3 * 4 / 18), abs=2e-3)
    # Demsar (2006) Iman-Davenport F_F = (N-1) chi2 / (N(k-1) - chi2) = 2 (2/3) / (6 - 2/3) = 0.25, df (2, 4)
    assert result["f_stat"] == pytest.approx(0.25) and result["f_df"] == [2, 4]
    assert result["f_p_value"] == pytest.approx(sps.f.sf(0.25, 2, 4)) and not result["rejects"]
    assert result["n_blocks"] == 3 and "Holm" in result["caveat"]


def test_higher_is_better_metric_ranks_the_largest_first(grid):
    summary = grid_stats.summarise(grid["runs"], "csi", "source-holdout")
    best = summary[summary.split_id == SPLIT_IDS[0]].sort_values("rank").iloc[0]
    assert best["combo"] == "lin+irm" and best["direction"] == "higher is better"
    assert summary.loc[summary["combo"] == "lin+irm", "vs_erm_wins"].iloc[0] == 2


def test_unknown_metric_names_what_was_logged(grid):
    with pytest.raises(InputError, match="available: .*target_mae"):
        grid_stats.summarise(grid["runs"], "nonsense", "source-holdout")


def test_missing_mlflow_run_is_a_clear_error(grid, tmp_path):
    record = json.loads(grid["records"][0].read_text())
    record["run_id"] = "0" * 32
    bad = tmp_path / "0.json"
    bad.write_text(json.dumps(record))
    with pytest.raises(InputError, match=rf"{bad}.*MLflow run 0{{32}} not found"):
        collect_runs([grid["records"][1], bad])


def test_metric_mismatch_is_an_error_naming_the_run(grid, tmp_path):
    record = json.loads(grid["records"][0].read_text())
    record["metrics"]["target_mae"] += 0.5
    bad = tmp_path / "0.json"
    bad.write_text(json.dumps(record))
    with pytest.raises(InputError, match=rf"{bad}: metrics.target_mae: MLflow run {record['run_id']}"):
        collect_runs([bad])


def test_missing_store_is_an_error_not_a_new_store(grid, tmp_path):
    record = json.loads(grid["records"][0].read_text())
    record["tracking_uri"] = f"sqlite:///{tmp_path}/absent.db"
    bad = tmp_path / "0.json"
    bad.write_text(json.dumps(record))
    with pytest.raises(InputError, match="does not exist"):
        collect_runs([bad])
    assert not (tmp_path / "absent.db").exists()


def test_superseded_runs_are_skipped_and_counted(grid):
    client = tracking.client_for(grid["uri"])
    run_id = json.loads(grid["records"][0].read_text())["run_id"]
    client.set_tag(run_id, tracking.SUPERSEDED_TAG, "newer")
    try:
        runs, skipped = collect_runs(grid["records"])
    finally:
        client.delete_tag(run_id, tracking.SUPERSEDED_TAG)
    assert len(runs) == 14 and run_id not in set(runs["run_id"])
    assert skipped == {"superseded": [str(grid["records"][0])]}


def test_splits_that_share_a_target_are_one_friedman_block():
    # two splits with target vell are averaged into one block: 2 blocks, not 3
    rows = []
    for split_id, target, means in (("a", "vell", (1.0, 2.0, 3.0)), ("b", "vell", (3.0, 2.0, 1.0)),
                                    ("c", "orra", (1.0, 2.0, 3.0))):
        rows += [{"split_id": split_id, "target": target, "combo": combo, "mean": mean, "metric": "target_mae",
                  "selection_rule": "source-holdout"} for combo, mean in zip(("x", "y", "z"), means)]
    result = grid_stats.friedman_over_targets(pd.DataFrame(rows))
    assert result["blocks"] == ["orra", "vell"] and result["n_splits"] == 3
    # vell's block is (2, 2, 2): all tied; orra ranks x < y < z; scipy.stats.friedmanchisquare as reference
    reference = sps.friedmanchisquare([2.0, 1.0], [2.0, 2.0], [2.0, 3.0])
    assert result["chi2"] == pytest.approx(reference.statistic)
    assert result["mean_ranks"] == pytest.approx({"x": 1.5, "y": 2.0, "z": 2.5})


@pytest.fixture(scope="module")
def grid_two_targets(tmp_path_factory):
    """The same fixture swept over two forecast variables: no2's errors are twice pm25's."""
    root = tmp_path_factory.mktemp("grid_two")
    records, _ = build_grid_store(root, targets=("pm25", "no2"))
    meta = aggregate(records, root / "results", metric="mae", n_boot=500)
    return {"root": root, "meta": meta, "summary": pd.read_csv(root / "results" / "grid.csv"),
            "dm": pd.read_csv(root / "results" / "grid_dm.csv")}


def test_each_forecast_target_is_its_own_grid(grid, grid_two_targets):
    summary, meta = grid_two_targets["summary"], grid_two_targets["meta"]
    assert sorted(summary["target_variable"].unique()) == ["no2", "pm25"]
    keys = ["selection_rule", "split_id", "model", "penalty"]
    # pm25's section is exactly the single-target grid: nothing of no2 enters its ranks, tests or intervals
    pm25 = summary[summary["target_variable"] == "pm25"].drop(columns=["target_variable", "run_ids"])
    single = grid["summary"].drop(columns="run_ids")  # run ids differ: every run was logged anew
    pd.testing.assert_frame_equal(pm25.sort_values(keys, ignore_index=True)[single.columns],
                                  single.sort_values(keys, ignore_index=True), check_dtype=False)
    # source-holdout: no2's means are twice pm25's, with its own label (unit of no2), and the same ranks
    holdout = summary[summary["selection_rule"] == "source-holdout"]
    no2 = holdout[holdout["target_variable"] == "no2"].set_index(keys).sort_index()
    both = holdout[holdout["target_variable"] == "pm25"].set_index(keys).sort_index()
    np.testing.assert_allclose(no2["mean"], 2 * both["mean"])
    assert (no2["rank"] == both["rank"]).all()
    assert no2["metric_label"].unique().tolist() == ["MAE of no2, ug/m3"]
    assert set(meta["targets"]) == {"pm25", "no2"} and meta["friedman"] == {}
    assert meta["targets"]["pm25"]["friedman"] == grid["meta"]["friedman"]
    # one Holm family per rule and variable: pm25's adjusted p-values are the single-target ones
    dm = grid_two_targets["dm"]
    assert set(dm["target_variable"]) == {"pm25", "no2"}
    single_dm = pd.read_csv(grid["root"] / "results" / "grid_dm.csv")
    np.testing.assert_allclose(dm[dm["target_variable"] == "pm25"]["dm_p_holm"].to_numpy(),
                               single_dm["dm_p_holm"].to_numpy())


def test_window_tables_give_horizon_and_stride_in_hours_for_a_daily_study():
    """A daily study's artifact has 3 y_hXX columns (3 steps) but a 72-hour horizon: the HAC lags
    ceil(H / s) - 1 need both in hours, or a 24-hour stride would see no overlap at all."""
    origins = pd.date_range("2025-01-01", periods=6, freq="D", tz="UTC")
    frame = pd.DataFrame({"station_id": "s1", "origin": origins, "selection": "source-holdout",
                          **{f"y_h{k:02d}": 1.0 for k in (1, 2, 3)}, **{f"p_h{k:02d}": 0.5 for k in (1, 2, 3)}})
    runs = pd.DataFrame({"run_id": ["r1"], "artifact_uri": [""], "tracking_uri": [""], "record": [""],
                         "param.forecast.horizon_hours": ["72"], "param.forecast.stride_hours": ["24"]})
    tables = window_tables(runs, ["source-holdout"], load=lambda *args: frame)
    assert (tables["r1"]["horizon"], tables["r1"]["stride"]) == (72, 24)
    assert stats.dm_lag_order(tables["r1"]["horizon"], tables["r1"]["stride"]) == 2


def test_a_moved_project_reads_its_predictions_from_its_own_artifacts(tmp_path):
    """The store keeps absolute artifact paths; after the project folder moved, re-aggregating must read the
    artifacts where they are now (under this project's mlartifacts/), not fail on the old place."""
    from pipeline.aggregate import PREDICTIONS_ARTIFACT, predictions_of
    from pipeline.tracking import local_artifacts
    moved = tmp_path / "new" / "results" / "mlartifacts"
    artifact = moved / "1" / "abc123" / "artifacts" / PREDICTIONS_ARTIFACT
    artifact.parent.mkdir(parents=True)
    pd.DataFrame({"origin": [1, 2]}).to_parquet(artifact)
    old_uri = (tmp_path / "old" / "results" / "mlartifacts" / "1" / "abc123" / "artifacts").as_uri()
    assert local_artifacts(old_uri, moved) == moved / "1" / "abc123" / "artifacts"
    assert predictions_of("abc123", old_uri, "", "record.json", project_artifacts=moved)["origin"].to_pylist() == [1, 2]
    with pytest.raises(InputError, match="abc123"):  # without the project's folder: the old place, one line
        predictions_of("abc123", old_uri, "", "record.json")
    here = (moved / "1" / "abc123" / "artifacts").as_uri()
    assert local_artifacts(here, tmp_path / "elsewhere") == moved / "1" / "abc123" / "artifacts"
