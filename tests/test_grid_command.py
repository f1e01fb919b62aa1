"""`shiftgrid grid` formats and filters, and `top_of_grid`, on the hand-made grid (no MLflow at read time)."""

import io
import json
from contextlib import redirect_stdout
from pathlib import Path
from types import SimpleNamespace

import pandas as pd
import pytest

from grid_fixture import SPLIT_IDS, build_grid_store
from pipeline.aggregate import aggregate
from pipeline.cli import main
from pipeline.commands.grid import top_of_grid


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    root = tmp_path_factory.mktemp("cmd")
    records, _ = build_grid_store(root)
    aggregate(records, root / "results", metric="mae", n_boot=100)
    return root / "results"


def grid(results, *args) -> tuple[int, str]:
    out = io.StringIO()
    with redirect_stdout(out):
        status = main(["--root", str(results.parent), "grid", "--results", str(results), *args])
    return status, out.getvalue()


def test_table_fits_100_columns_and_marks_the_best_cell_with_a_symbol(results):
    status, text = grid(results)
    assert status == 0 and max(map(len, text.splitlines())) <= 100
    best = [line for line in text.splitlines() if line.startswith("  * ")]
    assert len(best) == 3  # one per split
    assert any("persistence" in line for line in best) and sum("irm" in line for line in best) == 2
    assert "-9.1%" in text and "2/0/1" in text  # lin+irm vs ERM on the first split; its W/T/L
    assert "negative = the penalty lowered the metric" in text and "MAE of pm25, ug/m3" in text
    assert "seed range (min-max) below 3 seeds" in text and "Holm" in text


def test_csv_and_json_carry_the_same_rows(results):
    _, csv_text = grid(results, "--format", "csv")
    _, json_text = grid(results, "--format", "json")
    table = pd.read_csv(io.StringIO(csv_text))
    rows = json.loads(json_text)
    assert len(table) == len(rows) == 9
    assert table["mean"].tolist() == pytest.approx([row["mean"] for row in rows])
    assert set(table["selection_rule"]) == {"source-holdout"}


def test_markdown_is_a_pipe_table_with_the_rule(results):
    _, text = grid(results, "--format", "markdown")
    lines = text.splitlines()
    assert lines[0].startswith("Selection: source-holdout") and lines[3].startswith("|---")
    assert len([line for line in lines if line.startswith("| ")]) == 10  # header + 9 rows


def test_filters_metric_and_selection(results):
    _, text = grid(results, "--format", "csv", "--target", "vell", "--penalty", "irm,n/a")
    table = pd.read_csv(io.StringIO(text), keep_default_na=False)  # "n/a" is a penalty label here
    assert set(table["split_id"]) == {SPLIT_IDS[0]} and set(table["penalty"]) == {"irm", "n/a"}
    _, text = grid(results, "--selection", "target-peek", "--metric", "rmse")
    assert "upper bound" in text.splitlines()[0] and "RMSE of pm25, ug/m3" in " ".join(text.splitlines()[:2])
    _, text = grid(results, "--format", "json", "--metric", "csi")
    assert json.loads(text)[0]["rank"] == 1.0 and json.loads(text)[0]["mean"] == pytest.approx((1 / 1.9 + 1 / 2.1) / 2)


def test_bad_filter_is_a_one_line_error(results, capsys):
    status, _ = grid(results, "--model", "nosuchmodel")
    assert status == 2
    assert "no run has model ['nosuchmodel']" in capsys.readouterr().err


def test_top_of_grid_lists_combinations_by_mean_rank(results):
    cfg = SimpleNamespace(report=SimpleNamespace(metric="mae", selection="source-holdout", bootstrap_samples=50,
                                                 top_rows=2))
    text = top_of_grid(results, cfg)
    lines = text.splitlines()
    assert lines[2].split()[0] == "lin+irm" and lines[3].split()[0] == "lin+erm" and "persistence" not in lines[4]
    # 3 target cities, Iman-Davenport p 0.79 (tests/test_aggregate.py): no critical difference is claimed
    assert "Friedman over 3 target cities: Iman-Davenport p = 0.79, ranks not distinguishable" in text


def test_grid_takes_the_same_overrides_as_every_other_command(results):
    status, text = grid(results, "experiment=demo", "--format", "csv")
    assert status == 0 and "run_ids" in text.splitlines()[0]


def test_csv_carries_holm_p_and_origin_intervals_read_from_the_aggregation(results):
    _, text = grid(results, "--format", "csv")
    table = pd.read_csv(io.StringIO(text))
    dm = pd.read_csv(results / "grid_dm.csv")
    irm = table[table["penalty"] == "irm"].set_index("split_id")
    expected = dm[(dm.dm_loss == "absolute") & (dm.selection_rule == "source-holdout")].set_index("split_id")
    assert irm["dm_p_holm"].to_dict() == pytest.approx(expected["dm_p_holm"].to_dict())
    assert table["ci_low"].notna().all() and (table["ci_low"] <= table["ci_high"]).all()
    assert set(table["seed_interval"]) == {"seed range"}  # 1 or 2 seeds per cell


@pytest.fixture(scope="module")
def two_targets(tmp_path_factory):
    root = tmp_path_factory.mktemp("cmd_two")
    records, _ = build_grid_store(root, targets=("pm25", "no2"))
    aggregate(records, root / "results", metric="mae", n_boot=100)
    return root / "results"


def test_each_forecast_target_has_its_own_section_and_unit(results, two_targets):
    status, text = grid(two_targets)
    assert status == 0 and max(len(line) for line in text.splitlines()) <= 100
    sections = text.split("== forecast target ")
    assert [s.split(" ==")[0] for s in sections[1:]] == ["no2", "pm25"]
    assert "MAE of no2, ug/m3" in sections[1] and "MAE of pm25, ug/m3" in sections[2]
    assert "pm25" not in sections[1].replace("forecast target", "")  # no2's grid holds no pm25 cell
    # pm25's section is the single-target grid, line for line
    _, single = grid(results)
    assert sections[2].split("\n", 2)[2].rstrip() == single.rstrip()
    _, csv_text = grid(two_targets, "--format", "csv")
    table = pd.read_csv(io.StringIO(csv_text))
    assert table.columns[0] == "target_variable" and len(table) == 2 * len(pd.read_csv(io.StringIO(grid(results, "--format", "csv")[1])))
    _, markdown = grid(two_targets, "--format", "markdown")
    assert markdown.count("### Forecast target ") == 2
    cfg = SimpleNamespace(report=SimpleNamespace(metric="mae", selection="source-holdout", top_rows=2))
    top = top_of_grid(two_targets, cfg)
    assert top.count("top of the grid") == 2 and top.count("Friedman over 3 target cities") == 2


def test_variable_picks_one_forecast_target_of_the_grid_with_its_own_tests(results, two_targets, capsys):
    status, text = grid(two_targets, "--variable", "no2", "--format", "csv")
    table = pd.read_csv(io.StringIO(text))
    _, single = grid(results, "--format", "csv")
    pm25 = pd.read_csv(io.StringIO(single))
    # one variable reads as a single grid: no2's errors are twice pm25's (grid_fixture), ranks alike
    assert status == 0 and "target_variable" not in table.columns and len(table) == len(pm25)
    assert table["mean"].tolist() == pytest.approx((2 * pm25["mean"]).tolist())
    assert set(table["metric_label"]) == {"MAE of no2, ug/m3"} and table["rank"].tolist() == pm25["rank"].tolist()
    dm = pd.read_csv(two_targets / "grid_dm.csv")  # the Holm p of no2's own comparisons, not pm25's
    no2 = dm[(dm.target_variable == "no2") & (dm.dm_loss == "absolute") & (dm.selection_rule == "source-holdout")]
    irm = table[table["penalty"] == "irm"].set_index("split_id")
    assert irm["dm_p_holm"].to_dict() == pytest.approx(no2.set_index("split_id")["dm_p_holm"].to_dict())
    _, both = grid(two_targets, "--variable", "pm25,no2", "--target", "vell")
    assert both.count("== forecast target ") == 2
    status, _ = grid(two_targets, "--variable", "o3")
    assert status == 2 and "no run has variable ['o3']; known: no2, pm25" in capsys.readouterr().err


def test_runs_lists_the_forecast_variable_and_filters_by_it(two_targets, capsys):
    from pipeline import tracking

    uri = tracking.resolve_tracking_uri(None, two_targets)
    repo = Path(__file__).resolve().parents[1]  # its config only names the default store, overridden here
    command = ["--root", str(repo), "runs", "--tracking-uri", uri, "--experiment", "gridtest"]
    capsys.readouterr()
    assert main([*command, "--format", "json"]) == 0
    every = json.loads(capsys.readouterr().out)
    assert main([*command, "--variable", "no2", "--target", "vell", "--format", "json"]) == 0
    picked = json.loads(capsys.readouterr().out)
    assert {row["variable"] for row in every} == {"pm25", "no2"}
    expected = [row["run_id"] for row in every if row["variable"] == "no2" and row["target"] == "vell"]
    assert [row["run_id"] for row in picked] == expected and len(expected) > 0
    assert main([*command, "--variable", "no2", "--format", "csv"]) == 0
    table = pd.read_csv(io.StringIO(capsys.readouterr().out))
    assert list(table.columns[4:6]) == ["target", "variable"] and set(table["variable"]) == {"no2"}

def test_a_daily_grid_names_its_horizon_steps_in_days(results, tmp_path):
    import shutil

    daily = tmp_path / "results"
    shutil.copytree(results, daily, ignore=shutil.ignore_patterns("mlflow*", "artifacts", "runs"))
    runs = pd.read_parquet(daily / "grid.parquet")  # the fixture's 3 horizon steps, logged as 72 h: daily steps
    runs.assign(**{"param.forecast.horizon_hours": "72"}).to_parquet(daily / "grid.parquet")
    _, text = grid(daily, "--metric", "target_mae_h02")
    assert "MAE of pm25 at day 2 ahead, ug/m3" in " ".join(text.splitlines()[:2])
    _, text = grid(results, "--metric", "target_mae_h02")  # the hourly grid reads as before
    assert "MAE of pm25 at hour 2 ahead, ug/m3" in " ".join(text.splitlines()[:2])

def test_the_baselines_penalty_reads_n_a_and_is_stored_na_both_ways():
    from pipeline import names

    assert names.penalty_shown(names.NOT_APPLICABLE) == "n/a" and names.penalty_label("n/a") == names.NOT_APPLICABLE
    for penalty in ("erm", "irm", "vrex", "groupdro", names.NOT_APPLICABLE):  # a penalty's own name passes unchanged
        assert names.penalty_label(names.penalty_shown(penalty)) == penalty
    assert names.penalty_shown("irm") == "irm"
