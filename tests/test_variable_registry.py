"""The variable and site-type registry (config/variables.yaml): validation, and new entries without code."""

from pathlib import Path

import pytest
import yaml

from pipeline import variables
from pipeline.errors import InputError
from pipeline.units import conversion_to_canonical
from pipeline.variables import PACKAGED_REGISTRY, read_registry, registry_file

SHIPPED = yaml.safe_load(PACKAGED_REGISTRY.read_text())


def write(tmp_path, content) -> str:
    path = tmp_path / "variables.yaml"
    path.write_text(yaml.safe_dump(content))
    return path


def test_shipped_registry_holds_todays_variables_and_site_types():
    registry = read_registry(PACKAGED_REGISTRY)
    names = [v.name for v in registry.variables]
    assert names[:13] == ["pm25", "pm10", "no2", "co", "o3", "so2", "temp_c", "rh_pct", "wind_speed_ms",
                          "wind_dir_deg", "pressure_hpa", "precip_mm", "aux"]
    assert {"urban_traffic", "airport"} <= registry.site_types
    assert variables.BY_NAME["no2"].molar_mass_g_per_mol == 46.01


@pytest.mark.parametrize("change, field", [
    (lambda c: c["variables"]["pm25"].pop("unit"), "variables.pm25.unit"),
    (lambda c: c["variables"]["pm25"].update(high=-1.0), "variables.pm25.high"),
    (lambda c: c["variables"]["pm25"].update(low="zero"), "variables.pm25.low"),
    (lambda c: c["variables"]["no2"].update(molar_mass_g_per_mol=0), "variables.no2.molar_mass_g_per_mol"),
    (lambda c: c["variables"]["o3"].update(colour="blue"), "variables.o3.colour"),
    (lambda c: c["variables"].update({"PM1": c["variables"]["pm25"]}), "variables.PM1"),
    (lambda c: c["variables"].update({"pm25_qc": c["variables"]["pm25"]}), "variables.pm25_qc"),
    (lambda c: c.update(site_types=["urban", "Two Words"]), "site_types[1]"),
    (lambda c: c.pop("site_types"), "variables"),
])
def test_a_bad_entry_is_one_line_naming_file_and_field(tmp_path, change, field):
    content = yaml.safe_load(PACKAGED_REGISTRY.read_text())
    change(content)
    path = write(tmp_path, content)
    with pytest.raises(InputError) as caught:
        read_registry(path)
    message = str(caught.value)
    assert "\n" not in message and str(path) in message and f"{field}:" in message


def test_a_study_adds_variables_and_site_types_in_config_only(tmp_path, monkeypatch):
    content = yaml.safe_load(PACKAGED_REGISTRY.read_text())
    content["variables"]["dew_point"] = {"unit": "degC", "low": -80.0, "high": 40.0, "description": "dew point"}
    content["variables"]["solar_radiation"] = {"unit": "W/m^2", "low": 0.0, "high": 1500.0,
                                               "description": "global horizontal irradiance"}
    content["site_types"].append("weather_station")
    registry = read_registry(write(tmp_path, content))
    monkeypatch.setattr(variables, "registry", lambda: registry)
    # pint does the arithmetic: degF -> degC is (F - 32) * 5/9 (exact definition); 1 kW/m2 = 1000 W/m2
    assert conversion_to_canonical("dew_point", "degF").apply(50.0) == pytest.approx(10.0)
    assert conversion_to_canonical("solar_radiation", "kW/m2").apply(0.8) == pytest.approx(800.0)
    assert "weather_station" in variables.SITE_TYPES


def test_nox_as_no2_converts_with_the_molar_mass_of_no2():
    # NOx in mass units is expressed as NO2 (common practice, e.g. EU Directive 2008/50/EC [from memory]):
    # 1 ppb -> 46.01 / 24.45 = 1.8818 ug/m3 at 25 C, 1 atm, the same published factor as NO2
    # (common practice, e.g. US EPA guidance; see docs/references.md).
    nox = conversion_to_canonical("nox", "ppb")
    assert nox.factor == pytest.approx(1.8818, abs=1e-4)
    assert nox.as_record()["reference_pressure_atm"] == 1.0


def test_a_project_reads_its_own_variables_file(tmp_path, monkeypatch):
    """Rules run in the project folder: its config/variables.yaml wins over the shipped one, so a study adds
    a variable without touching the installed package; a project without one uses the shipped file."""
    # as in a fresh job process: a test that ran the CLI in this worker set the root to its --root
    monkeypatch.setattr(variables, "_project_root", Path("."))
    monkeypatch.chdir(tmp_path)
    assert registry_file() == PACKAGED_REGISTRY
    content = yaml.safe_load(PACKAGED_REGISTRY.read_text())
    content["variables"]["bc"] = {"unit": "ug/m3", "low": 0.0, "high": 500.0, "description": "black carbon"}
    (tmp_path / "config").mkdir()
    (tmp_path / "config" / "variables.yaml").write_text(yaml.safe_dump(content))
    assert registry_file() == (tmp_path / "config" / "variables.yaml").resolve()
    assert "bc" in {v.name for v in read_registry(registry_file()).variables}
