"""A variable the shipped registry lacks, declared in a project's own config only, through the real DAG.

The project adds `bc` (black carbon) to its config/variables.yaml and writes a data config for three
invented towns whose dumps deliver it in ng/m3; ingestion converts it to the declared ug/m3, the windows
forecast it, and the grid ranks it. No code knows the name `bc`. Invented data (an AR(1) series with a
daily cycle), stations at sea in the South Pacific.
"""

import json

import numpy as np
import pandas as pd
import pytest
import yaml

from project_copy import make_project, shiftgrid

pytestmark = pytest.mark.e2e
TOWNS = ["quillmere", "rossvik", "tarnby"]
OVERRIDES = ["data=bcstudy", "forecast.target=bc", "forecast.lookback_hours=24", "forecast.horizon_hours=6",
             "forecast.stride_hours=2", "split.schemes=[loco]", f"split.cities=[{','.join(TOWNS)}]",
             "sweep.models=[persistence,ridge]", "sweep.penalties=[erm]", "sweep.seeds=[0]",
             "report.bootstrap_samples=100", "tracking.experiment=bc-study"]
DATA_CONFIG = {
    "name": "bcstudy", "stations": "config/stations_bcstudy.csv", "raw_dir": "data/bcstudy/raw",
    "clean_dir": "data/bcstudy/clean", "qc_dir": "data/bcstudy/qc",
    "cities": {town: {"layout": "wide_csv", "station_column": "site",
                      "time": {"column": "stamp", "format": "%Y-%m-%d %H:%M"},
                      "columns": {"bc_ng": "bc"}, "units": {"bc": "ng/m3"}} for town in TOWNS},
}


def write_dump(folder, town: str, level: float, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    hours = pd.date_range("2025-03-01", periods=12 * 24, freq="h")
    noise = np.zeros(len(hours))
    for t in range(1, len(hours)):
        noise[t] = 0.8 * noise[t - 1] + rng.normal(0.0, 150.0)
    daily = 400.0 * np.sin(2 * np.pi * hours.hour / 24)
    dump = pd.DataFrame({"site": f"{town[:3]}1", "stamp": hours.strftime("%Y-%m-%d %H:%M"),
                         "bc_ng": np.round(np.maximum(level + daily + noise, 0.0), 1)})
    (folder / town).mkdir(parents=True)
    dump.to_csv(folder / town / "bc.csv", index=False)
    return dump


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    project = make_project(tmp_path_factory.mktemp("own_variable"))
    registry = yaml.safe_load((project / "config" / "variables.yaml").read_text())
    assert "bc" not in registry["variables"]  # the shipped list lacks it: the project declares it
    registry["variables"]["bc"] = {"unit": "ug/m3", "low": 0.0, "high": 500.0, "description": "black carbon"}
    (project / "config" / "variables.yaml").write_text(yaml.safe_dump(registry, sort_keys=False))
    (project / "config" / "data" / "bcstudy.yaml").write_text(yaml.safe_dump(DATA_CONFIG, sort_keys=False))
    stations = pd.DataFrame({"station_id": [f"{t[:3]}1" for t in TOWNS], "city": TOWNS,
                             "lat": [-40.0, -41.0, -42.0], "lon": [-120.0, -121.0, -122.0],
                             "elevation_m": 0.0, "site_type": "urban_background"})
    stations.to_csv(project / "config" / "stations_bcstudy.csv", index=False)
    dumps = {town: write_dump(project / "data" / "bcstudy" / "raw", town, 1500.0 + 500.0 * k, k)
             for k, town in enumerate(TOWNS)}
    ran = shiftgrid(project, "run", *OVERRIDES)
    assert ran.returncode == 0, (ran.stdout[-3000:], ran.stderr[-3000:])
    return project, dumps


def test_the_declared_variable_is_converted_to_its_declared_unit(finished):
    project, dumps = finished
    clean = pd.read_parquet(project / "data" / "bcstudy" / "clean" / "tarnby.parquet")
    delivered = dumps["tarnby"]["bc_ng"].to_numpy()
    # 1 ug = 1000 ng (SI prefixes): the clean table holds ug/m3, the variable's declared unit
    np.testing.assert_allclose(np.sort(clean["bc"].dropna().to_numpy()), np.sort(delivered) / 1000.0, rtol=1e-9)


def test_the_grid_ranks_forecasts_of_the_declared_variable(finished):
    project, _ = finished
    grid = pd.read_csv(project / "results" / "grid.csv")
    headline = grid[(grid["selection_rule"] == "source-holdout") & (grid["metric"] == "target_mae")]
    assert set(headline["target"]) == set(TOWNS)
    assert set(headline["model"]) == {"persistence", "ridge"}
    assert np.isfinite(headline["mean"]).all() and (headline["mean"] > 0).all()
    assert headline["metric_label"].str.contains("bc").all() and headline["metric_label"].str.contains("ug/m3").all()
    meta = json.loads((project / "results" / "grid_meta.json").read_text())
    assert "bc" in json.dumps(meta)
