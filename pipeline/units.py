"""Unit conversion from delivered units into the canonical units of config/variables.yaml, through pint.

Reads nothing and writes nothing: pure functions used by ingestion (and, inverted, by the demo
generator). Obeys the data-config key `reference_temperature_c` (gas ppb <-> ug/m3 reference).

Every conversion is affine, canonical = value * factor + offset, computed by pint (a maintained units
library: unit definitions, prefixes and offset temperature scales are its own) and returned as a
`Conversion` record so the QC report can state exactly what was applied. Delivered spellings seen in
dumps ("ugm-3", "kph", "°C") are mapped to one spelling first; any other text pint understands
("W/m^2", "furlong / fortnight") is accepted as pint spells it, so a study's new variable needs no code.

Gas conversion (common practice, e.g. US EPA guidance): a mixing ratio becomes a mass concentration by
ppb * M / Vm = ug/m3 (ppm * M / Vm = mg/m3), M the variable's molar mass (config/variables.yaml) and Vm
the molar volume. It is pint's context `mixing_ratio`, whose parameters are M and Vm. Vm is the
trade's conventional 24.45 L/mol at 25 C and 1 atm, scaled to other reference conditions with the ideal
gas law: Vm(T, p) = 24.45 * (T / 298.15 K) * (1013.25 hPa / p). (Why anchor on 24.45 rather than
R T / p = 24.465 at 25 C: the published conversion factors agencies apply, e.g. 1 ppb NO2 = 1.88 ug/m3,
use 24.45; the two differ by 0.06 %.)
"""

import re
from dataclasses import dataclass
from functools import lru_cache

from pipeline.errors import InputError
from pipeline import variables
from pipeline.variables import registry_file

CONVENTIONAL_MOLAR_VOLUME_L = 24.45  # at 25 C and 1 atm (common practice)
CONVENTIONAL_TEMPERATURE_K = 298.15
STANDARD_PRESSURE_HPA = 1013.25  # 1 atm (exact definition)
ZERO_CELSIUS_K = 273.15
MIXING_RATIO_CONTEXT = "mixing_ratio"

# Spelling variants seen in deliveries -> one spelling per unit.
_ALIASES = {
    "ug/m3": "ug/m3", "ugm-3": "ug/m3", "ug m-3": "ug/m3", "microg/m3": "ug/m3",
    "mg/m3": "mg/m3", "mgm-3": "mg/m3", "mg m-3": "mg/m3",
    "ppb": "ppb", "ppbv": "ppb", "ppm": "ppm", "ppmv": "ppm",
    "degc": "degC", "c": "degC", "celsius": "degC", "°c": "degC", "deg c": "degC",
    "degf": "degF", "f": "degF", "fahrenheit": "degF", "°f": "degF", "deg f": "degF",
    "k": "K", "kelvin": "K",
    "%": "%", "pct": "%", "percent": "%", "fraction": "fraction",
    "m/s": "m/s", "ms-1": "m/s", "m s-1": "m/s", "km/h": "km/h", "kmh": "km/h", "kph": "km/h",
    "mph": "mph", "knots": "knots", "knot": "knots", "kt": "knots", "kn": "knots",
    "deg": "deg", "degrees": "deg", "°": "deg",
    "hpa": "hPa", "mbar": "hPa", "mb": "hPa", "kpa": "kPa", "pa": "Pa", "inhg": "inHg",
    "mmhg": "mmHg",
    "mm": "mm", "cm": "cm", "in": "inch", "inch": "inch", "inches": "inch",
    "index": "index", "1": "index",
}
# Our spellings -> pint's unit expressions. ppbv/ppmv are defined below: pint has no ppb.
_PINT = {"ug/m3": "ug/m**3", "mg/m3": "mg/m**3", "ppb": "ppbv", "ppm": "ppmv", "degC": "degC",
         "degF": "degF", "K": "kelvin", "%": "percent", "fraction": "dimensionless", "m/s": "m/s",
         "km/h": "km/hour", "mph": "mile/hour", "knots": "knot", "deg": "degree", "hPa": "hPa",
         "kPa": "kPa", "Pa": "Pa", "inHg": "inch_Hg", "mmHg": "mmHg", "mm": "mm", "cm": "cm",
         "inch": "inch", "index": "dimensionless"}
MIXING_RATIOS = ("ppb", "ppm")


@lru_cache(maxsize=1)
def unit_registry():
    """pint's registry with ppbv/ppmv and the mixing-ratio context (built once; pint loads in ~0.5 s)."""
    import pint

    registry = pint.UnitRegistry()
    registry.define("ppbv = 1e-9")
    registry.define("ppmv = 1e-6")
    context = pint.Context(MIXING_RATIO_CONTEXT)
    context.add_transformation("[]", "[mass] / [length] ** 3",
                               lambda ureg, ratio, molar_mass, molar_volume: ratio * molar_mass / molar_volume)
    registry.add_context(context)
    return registry


@dataclass(frozen=True)
class Conversion:
    """canonical = value * factor + offset; reference conditions only for gas mixing ratios."""
    variable: str
    from_unit: str
    to_unit: str
    factor: float
    offset: float = 0.0
    molecular_weight_g_per_mol: float | None = None
    reference_temperature_c: float | None = None
    molar_volume_l_per_mol: float | None = None
    reference_pressure_hpa: float = STANDARD_PRESSURE_HPA

    def apply(self, values):
        return values * self.factor + self.offset

    def invert(self, values):
        return (values - self.offset) / self.factor

    def as_record(self) -> dict:
        record = {"from": self.from_unit, "to": self.to_unit, "factor": self.factor,
                  "offset": self.offset}
        if self.molecular_weight_g_per_mol is not None:
            record.update(molecular_weight_g_per_mol=self.molecular_weight_g_per_mol,
                          reference_temperature_c=self.reference_temperature_c,
                          reference_pressure_atm=self.reference_pressure_hpa / STANDARD_PRESSURE_HPA,
                          molar_volume_l_per_mol=self.molar_volume_l_per_mol)
        return record


def _pint_spelling(text: str) -> str | None:
    """pint's own spelling of a unit text ("W/m2" and "W/m^2" -> "watt / meter ** 2"), or None."""
    registry = unit_registry()
    expression = re.sub(r"(?<=[A-Za-z])([23])\b", r"**\1", text)  # m2, m3 -> m**2, m**3
    try:
        return str(registry.parse_units(expression))
    except Exception:  # pint raises several error types (undefined unit, syntax): all mean "unknown"
        return None


def normalise_unit(text: str) -> str | None:
    """Delivered unit text -> the one spelling used here (or pint's for other units), None when unknown."""
    key = str(text).strip().lower().replace("µ", "u").replace("μ", "u").replace("³", "3")
    key = key.replace("**", "").replace("^", "")
    if key in _ALIASES:
        return _ALIASES[key]
    return _pint_spelling(str(text).strip()) if str(text).strip() else None


def molar_volume_l_per_mol(reference_temperature_c: float,
                           reference_pressure_hpa: float = STANDARD_PRESSURE_HPA) -> float:
    """Molar volume of an ideal gas, anchored on the conventional 24.45 L/mol at 25 C and 1 atm."""
    kelvin = reference_temperature_c + ZERO_CELSIUS_K
    if kelvin <= 0:
        raise InputError(f"reference temperature {reference_temperature_c} C is below absolute zero",
                         field="reference_temperature_c")
    return (CONVENTIONAL_MOLAR_VOLUME_L * kelvin / CONVENTIONAL_TEMPERATURE_K
            * STANDARD_PRESSURE_HPA / reference_pressure_hpa)


def _canonical_unit(variable: str) -> str:
    spelled = normalise_unit(variables.BY_NAME[variable].unit)
    if spelled is None:
        raise InputError(f"unknown unit '{variables.BY_NAME[variable].unit}'", file=str(registry_file()),
                         field=f"variables.{variable}.unit")
    return spelled


def conversion_to_canonical(variable: str, unit: str, reference_temperature_c: float = 25.0,
                            *, where: str | None = None) -> Conversion:
    """The conversion from `unit` into the canonical unit of `variable`; InputError if impossible.

    `where` names the config field or file position for the error message.
    """
    if variable not in variables.BY_NAME:
        raise InputError(f"unknown variable '{variable}' (known: {', '.join(variables.BY_NAME)}; a new one "
                         f"goes into config/variables.yaml)", field=where or "variable")
    spelled = normalise_unit(unit)
    if spelled is None:
        raise InputError(f"unknown unit '{unit}' for {variable}", field=where or "unit")
    canonical = _canonical_unit(variable)
    registry = unit_registry()
    source, target = registry.Quantity(1.0, _PINT.get(spelled, spelled)), _PINT.get(canonical, canonical)
    if spelled in MIXING_RATIOS and canonical not in MIXING_RATIOS:
        weight = variables.BY_NAME[variable].molar_mass_g_per_mol
        if weight is None:
            raise InputError(f"unit '{unit}' is a mixing ratio but {variable} is not a gas with a known "
                             f"molecular weight (molar_mass_g_per_mol in config/variables.yaml)",
                             field=where or "unit")
        volume = molar_volume_l_per_mol(reference_temperature_c)
        factor = source.to(target, MIXING_RATIO_CONTEXT, molar_mass=registry.Quantity(weight, "g/mol"),
                           molar_volume=registry.Quantity(volume, "L/mol")).magnitude
        return Conversion(variable, spelled, canonical, float(factor), 0.0, weight,
                          float(reference_temperature_c), volume)
    try:
        zero = registry.Quantity(0.0, source.units).to(target).magnitude
        one = source.to(target).magnitude
    except Exception:  # pint's DimensionalityError and offset-unit errors: no conversion exists
        raise InputError(f"cannot convert '{unit}' into {canonical} for {variable}",
                         field=where or "unit") from None
    return Conversion(variable, spelled, canonical, float(one - zero), float(zero))
