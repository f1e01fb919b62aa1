"""Unit conversions against published values (common practice) and exact unit definitions."""

import pytest
import scipy.constants

from pipeline.errors import InputError
from pipeline.units import conversion_to_canonical, molar_volume_l_per_mol, normalise_unit


def factor(variable, unit, temperature=25.0):
    return conversion_to_canonical(variable, unit, temperature).factor


# (common practice, e.g. US EPA guidance; 24.45 L/mol at 25 C, 1 atm).
@pytest.mark.parametrize("variable, expected", [("no2", 1.8818), ("o3", 1.9632), ("so2", 2.6204)])
def test_one_ppb_in_ug_per_m3_matches_checks_section_8(variable, expected):
    assert factor(variable, "ppb") == pytest.approx(expected, abs=1e-4)


def test_co_one_ppm_is_1_1456_mg_per_m3():  # common practice, values computed
    assert factor("co", "ppm") == pytest.approx(1.1456, abs=1e-4)


def test_o3_70_ppb_is_137_42_ug_per_m3():  # common practice, values computed
    assert conversion_to_canonical("o3", "ppb").apply(70.0) == pytest.approx(137.42, abs=0.01)


def test_no2_200_ug_per_m3_is_106_28_ppb():  # common practice (inverse direction)
    assert conversion_to_canonical("no2", "ppb").invert(200.0) == pytest.approx(106.28, abs=0.01)


def test_co_ppb_and_no2_ppm_scale_by_a_thousand():
    assert factor("co", "ppb") == pytest.approx(1.1456e-3, rel=1e-4)
    assert factor("no2", "ppm") == pytest.approx(1881.8, rel=1e-4)


def test_20_c_reference_differs_by_about_1_7_percent():
    # EU practice uses 293 K; values differ by ~1.7 % [from memory, see docs/references.md].
    ratio = factor("no2", "ppb", 20.0) / factor("no2", "ppb", 25.0)
    assert ratio == pytest.approx(1.017, abs=0.001)
    assert molar_volume_l_per_mol(20.0) == pytest.approx(24.04, abs=0.01)


def test_conventional_molar_volume_agrees_with_ideal_gas_constant():
    # scipy.constants (CODATA): Vm = R T / p at 298.15 K and 1 atm is 24.465 L/mol; the trade's 24.45
    # is within 0.1 % of it.
    ideal = scipy.constants.R * 298.15 / scipy.constants.atm * 1000.0
    assert molar_volume_l_per_mol(25.0) == pytest.approx(ideal, rel=1e-3)


def test_gas_conversion_records_reference_conditions():
    record = conversion_to_canonical("so2", "ppb", 20.0).as_record()
    assert record["reference_temperature_c"] == 20.0 and record["reference_pressure_atm"] == 1.0
    assert record["molecular_weight_g_per_mol"] == 64.07


@pytest.mark.parametrize("variable, unit, value, expected", [
    ("temp_c", "degF", 212.0, 100.0), ("temp_c", "degF", 32.0, 0.0), ("temp_c", "K", 273.15, 0.0),
    ("wind_speed_ms", "mph", 1.0, 0.44704),      # 1 mile = 1609.344 m (exact definition)
    ("wind_speed_ms", "knots", 1.0, 0.514444),   # 1 knot = 1852 m/h (exact definition)
    ("wind_speed_ms", "km/h", 36.0, 10.0),
    ("precip_mm", "inch", 1.0, 25.4),            # 1 inch = 25.4 mm (exact definition)
    ("pressure_hpa", "kPa", 101.325, 1013.25), ("pressure_hpa", "inHg", 29.92, 1013.208),
    ("rh_pct", "fraction", 0.5, 50.0), ("pm25", "mg/m3", 0.012, 12.0), ("co", "ug/m3", 1500.0, 1.5),
])
def test_meteorological_and_mass_units(variable, unit, value, expected):
    assert conversion_to_canonical(variable, unit).apply(value) == pytest.approx(expected, abs=1e-3)


def test_unit_spellings_are_normalised():
    assert normalise_unit(" µg/m³ ") == "ug/m3" and normalise_unit("MPH") == "mph"
    assert normalise_unit("blorps") is None and normalise_unit("") is None
    # other units are spelled as pint spells them, so a study can declare e.g. solar radiation in W/m2
    assert normalise_unit("W/m2") == normalise_unit("W/m^2") == "watt / meter ** 2"


@pytest.mark.parametrize("variable, unit", [("no2", "furlongs"), ("pm25", "ppb"), ("temp_c", "m/s")])
def test_impossible_conversions_raise_input_error(variable, unit):
    with pytest.raises(InputError, match=unit):
        conversion_to_canonical(variable, unit)
