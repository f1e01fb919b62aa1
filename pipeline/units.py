"""Unit conversion from delivered units into the canonical units of pipeline.variables.

Reads nothing and writes nothing: pure functions used by ingestion (and, inverted, by the demo
generator). Obeys the data-config key `reference_temperature_c` (gas ppb <-> ug/m3 reference).

Every conversion is affine, canonical = value * factor + offset, and comes back as a `Conversion`
record so the QC report can state exactly what was applied.

Gas conversion (common practice, e.g. US EPA guidance): at 1 atm,
ug/m3 = ppb * MW / Vm and mg/m3 = ppm * MW / Vm. Vm is the trade's conventional 24.45 L/mol at 25 C,
scaled to other reference temperatures with the ideal gas law: Vm(T) = 24.45 * T / 298.15 K.
(Why anchor on 24.45 rather than 22.414 * T / 273.15 = 24.465 at 25 C: the published conversion factors
agencies apply, e.g. 1 ppb NO2 = 1.88 ug/m3, use 24.45; the two differ by 0.06 %.)
"""

from dataclasses import dataclass

from pipeline.errors import InputError
from pipeline.variables import BY_NAME

# Molecular weights in g/mol (common practice).
MOLECULAR_WEIGHT_G_PER_MOL = {"no2": 46.01, "o3": 48.00, "so2": 64.07, "co": 28.01}
CONVENTIONAL_MOLAR_VOLUME_L = 24.45  # at 25 C and 1 atm (common practice)
CONVENTIONAL_TEMPERATURE_K = 298.15
ZERO_CELSIUS_K = 273.15

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

# Non-gas conversions: (unit, canonical unit) -> (factor, offset). Sources: exact definitions
# (1 inch = 25.4 mm, 1 mile = 1609.344 m, 1 knot = 1852 m / 3600 s, 1 inHg = 33.8639 hPa,
# 1 mmHg = 1.333224 hPa) [from memory]; degF -> degC = (F - 32) * 5/9.
_SIMPLE = {
    ("ug/m3", "ug/m3"): (1.0, 0.0), ("mg/m3", "ug/m3"): (1000.0, 0.0),
    ("mg/m3", "mg/m3"): (1.0, 0.0), ("ug/m3", "mg/m3"): (0.001, 0.0),
    ("degC", "degC"): (1.0, 0.0), ("degF", "degC"): (5.0 / 9.0, -32.0 * 5.0 / 9.0),
    ("K", "degC"): (1.0, -ZERO_CELSIUS_K),
    ("%", "%"): (1.0, 0.0), ("fraction", "%"): (100.0, 0.0),
    ("m/s", "m/s"): (1.0, 0.0), ("km/h", "m/s"): (1.0 / 3.6, 0.0),
    ("mph", "m/s"): (1609.344 / 3600.0, 0.0), ("knots", "m/s"): (1852.0 / 3600.0, 0.0),
    ("deg", "deg"): (1.0, 0.0),
    ("hPa", "hPa"): (1.0, 0.0), ("kPa", "hPa"): (10.0, 0.0), ("Pa", "hPa"): (0.01, 0.0),
    ("inHg", "hPa"): (33.8639, 0.0), ("mmHg", "hPa"): (1.333224, 0.0),
    ("mm", "mm"): (1.0, 0.0), ("cm", "mm"): (10.0, 0.0), ("inch", "mm"): (25.4, 0.0),
    ("index", "index"): (1.0, 0.0),
}
KNOWN_UNITS = frozenset(_ALIASES.values())


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
                          reference_pressure_atm=1.0,
                          molar_volume_l_per_mol=self.molar_volume_l_per_mol)
        return record


def normalise_unit(text: str) -> str | None:
    """Delivered unit text -> the one spelling used here, or None when unknown."""
    key = str(text).strip().lower().replace("µ", "u").replace("μ", "u").replace("³", "3")
    key = key.replace("**", "").replace("^", "")
    return _ALIASES.get(key)


def molar_volume_l_per_mol(reference_temperature_c: float) -> float:
    """Molar volume of an ideal gas at 1 atm, anchored on the conventional 24.45 L/mol at 25 C."""
    kelvin = reference_temperature_c + ZERO_CELSIUS_K
    if kelvin <= 0:
        raise InputError(f"reference temperature {reference_temperature_c} C is below absolute zero",
                         field="reference_temperature_c")
    return CONVENTIONAL_MOLAR_VOLUME_L * kelvin / CONVENTIONAL_TEMPERATURE_K


def conversion_to_canonical(variable: str, unit: str, reference_temperature_c: float = 25.0,
                            *, where: str | None = None) -> Conversion:
    """The conversion from `unit` into the canonical unit of `variable`; InputError if impossible.

    `where` names the config field or file position for the error message.
    """
    if variable not in BY_NAME:
        raise InputError(f"unknown variable '{variable}'", field=where or "variable")
    spelled = normalise_unit(unit)
    if spelled is None:
        raise InputError(f"unknown unit '{unit}' for {variable}", field=where or "unit")
    canonical = BY_NAME[variable].unit
    if spelled in ("ppb", "ppm"):
        if variable not in MOLECULAR_WEIGHT_G_PER_MOL:
            raise InputError(f"unit '{unit}' is a mixing ratio but {variable} is not a gas "
                             f"with a known molecular weight", field=where or "unit")
        weight = MOLECULAR_WEIGHT_G_PER_MOL[variable]
        volume = molar_volume_l_per_mol(reference_temperature_c)
        # ppb * MW / Vm gives ug/m3, ppm * MW / Vm gives mg/m3; then rescale to the canonical mass unit.
        to_ug = weight / volume * (1000.0 if spelled == "ppm" else 1.0)
        factor = to_ug * (0.001 if canonical == "mg/m3" else 1.0)
        return Conversion(variable, spelled, canonical, factor, 0.0, weight,
                          float(reference_temperature_c), volume)
    if (spelled, canonical) not in _SIMPLE:
        raise InputError(f"cannot convert '{unit}' into {canonical} for {variable}",
                         field=where or "unit")
    factor, offset = _SIMPLE[(spelled, canonical)]
    return Conversion(variable, spelled, canonical, factor, offset)
