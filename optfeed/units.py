"""Units: parsing quantities from problem files and converting them once.

Inside optfeed every number is a plain float in one coherent system of units:

    mass g, length dm (so volume L), time h, amount of substance mmol, temperature K.

A quantity's internal value is its magnitude in the product of these base units that
matches its dimension (a rate of 0.2 L/h is 0.2; 500 mg/L is 0.5; 100 W is
1.296e8 g*dm^2/h^3). Because the system is coherent, any dimensionally consistent
model expression evaluated on internal values gives its result in internal units too.
Conversion back to a user's unit happens only when reporting.

A bare number takes the default unit of its kind (:data:`KINDS`).

Only units with a use in bioprocess work are accepted (:data:`KNOWN_UNITS`, with any
SI prefix): a parsec or a light year in a problem file is a typing slip or a joke,
not a model. Temperatures with an offset (degC, degF) are refused, because a value
in them cannot be converted by a factor: write K, or ``delta_degC`` for a
difference.
"""

from __future__ import annotations

import functools
import importlib.util
import math
import re
from dataclasses import dataclass


def _import_pint():
    """pint, imported without its support for dask arrays: where dask is installed
    (optfeed's clusters), pint imports dask.base as it is imported itself, for dask
    arrays of quantities, which optfeed never makes (measured: 0.2 s CPU in every
    process, a tenth of a small optimize run). dask is hidden from pint's one check
    (importlib.util.find_spec, which pint binds at import) while pint is imported,
    and nowhere else: optfeed's sweeps import dask as usual. Where pint was imported
    before optfeed, it is left as it is."""
    real = importlib.util.find_spec

    def find_spec(name, *args, **kwargs):
        return None if name == "dask" else real(name, *args, **kwargs)

    importlib.util.find_spec = find_spec
    try:
        import pint
    finally:
        importlib.util.find_spec = real
    return pint


pint = _import_pint()



def _registry():
    """pint's registry, with its parsed definitions cached in the user's cache folder
    (measured: building it costs about 0.25 s CPU per process, about 0.03 s from the
    cache); without a writable cache folder it is built as usual."""
    try:
        return pint.UnitRegistry(cache_folder=":auto:")
    except Exception:  # noqa: BLE001 - a cache is an optimisation, never a failure
        return pint.UnitRegistry()


UREG = _registry()
UREG.define("cell = 1 = cells")

# base dimension -> internal unit
_BASE = {
    "[mass]": "g",
    "[length]": "dm",
    "[time]": "h",
    "[substance]": "mmol",
    "[temperature]": "K",
}


@dataclass(frozen=True)
class Kind:
    """A kind of quantity: its default unit and the dimension it must have."""

    name: str
    default_unit: str
    example: str
    dimensions: tuple  # accepted dimensionalities (pint UnitsContainer); empty = any

    def accepts(self, q) -> bool:
        return not self.dimensions or q.dimensionality in self.dimensions


def _dim(unit: str):
    return UREG.Quantity(1, unit).dimensionality


KINDS = {
    "time": Kind("time", "h", "24 h", (_dim("h"),)),
    "volume": Kind("volume", "L", "10 L", (_dim("L"),)),
    "flow": Kind("flow", "L/h", "0.2 L/h", (_dim("L/h"),)),
    "concentration": Kind(
        "concentration", "g/L", "500 g/L", (_dim("g/L"), _dim("mmol/L"), _dim("1/L"), _dim(""))
    ),
    "specific_rate": Kind("specific_rate", "1/h", "0.15 1/h", (_dim("1/h"),)),
    "oxygen_rate": Kind("oxygen_rate", "mmol/L/h", "150 mmol/L/h", (_dim("mmol/L/h"),)),
    "power": Kind("power", "W", "500 W", (_dim("W"),)),
    "heat_yield": Kind("heat_yield", "kJ/mol", "460 kJ/mol", (_dim("kJ/mol"),)),
    # a share of something: '10 %', or a bare fraction (0.1)
    "fraction": Kind("fraction", "", "10 %", (_dim(""),)),
    # species amounts: anything, bare numbers are g/L
    "amount": Kind("amount", "g/L", "0.5 g/L", ()),
    # parameters and bounds on expressions: anything, bare numbers are internal units
    "any": Kind("any", "", "0.5 g/L", ()),
}

_NUMBER = r"[-+]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][-+]?[0-9]+)?"  # ASCII digits only
_QUANTITY_RE = re.compile(rf"^\s*(?P<num>{_NUMBER})\s*(?P<unit>.*?)\s*$")
# unit text: names, '1' alone (as in 1/h), small integer exponents, * / ( ) and spaces
_UNIT_TOKEN = re.compile(r"\s*(?:(?P<name>[A-Za-z_µμ%°][A-Za-z_µμ°0-9]*)|(?P<op>\*\*|[*/^()])|(?P<int>-?[0-9]+))")


# pint's names of the units a bioprocess model may use (each with any SI prefix):
# mass, volume, length (vessel and impeller sizes, bubble and cell diameters), time,
# amount of substance, temperature (absolute or a difference), energy, power,
# pressure, stirring speed and frequency, force, cell counts, fractions.
KNOWN_UNITS = frozenset({
    "gram", "metric_ton", "pound", "ounce",
    "liter", "cubic_centimeter", "gallon",
    "meter", "inch", "foot",
    "second", "minute", "hour", "day", "week",
    "mole", "equivalent",
    "kelvin", "delta_degree_Celsius", "delta_degree_Fahrenheit",
    "joule", "calorie", "watt_hour", "watt", "horsepower",
    "pascal", "bar", "standard_atmosphere", "pound_force_per_square_inch", "meter_Hg", "torr",
    "hertz", "revolutions_per_minute", "revolution", "newton", "volt", "ampere", "siemens", "ohm",
    "cell", "percent", "ppm", "dimensionless",
})
_OFFSET_UNITS = frozenset({"degree_Celsius", "degree_Fahrenheit", "degree_Reaumur", "degree_Rankine"})


def _check_unit_names(units, text: str) -> None:
    """Refuse unit names with no bioprocess use, and temperatures with an offset
    (pint quietly reads 'degC/L' as a temperature difference per litre: refused too)."""
    for m in _UNIT_TOKEN.finditer(text):
        name = m.group("name")
        if name and any(n in _OFFSET_UNITS for n in _units_of(name)):
            raise ValueError(f"unit {text!r}: {name!r} is a temperature with an offset, which cannot be converted "
                             "by a factor; write K, or delta_degC for a temperature difference")
    for name in units._units:
        try:
            parsed = UREG.parse_unit_name(name, case_sensitive=True)
        except Exception:  # noqa: BLE001 - pint raises several types
            parsed = ()
        if not any(unit in KNOWN_UNITS or unit in _OFFSET_UNITS for _, unit, _ in parsed):
            raise ValueError(f"unit {text!r}: {name!r} has no use in a bioprocess model; write the value in "
                             "units of mass, volume, length, time, amount, temperature, energy, power, pressure, "
                             "cells or a fraction (g, L, m, h, mol, K, J, W, bar, cell, %)")


def _check_unit_text(text: str) -> None:
    """Reject unit strings that are not a plain product of names and small powers."""
    if len(text) > 80:
        raise ValueError("unit text is too long")
    pos, prev_op = 0, None
    while pos < len(text):
        m = _UNIT_TOKEN.match(text, pos)
        if not m or m.end() == pos:
            raise ValueError(f"unexpected character {text[pos:].strip()[:1]!r} in unit {text!r}")
        if m.group("int") is not None:
            n = int(m.group("int"))
            if prev_op in ("**", "^"):
                if abs(n) > 12:
                    raise ValueError(f"exponent {n} in unit {text!r} is out of range")
            elif n != 1:
                raise ValueError(f"number {n} inside unit {text!r}; write it before the unit")
        prev_op = m.group("op")
        pos = m.end()


def parse_quantity(value, kind: str):
    """Parse ``value`` ("200 mL/h", 0.2, "0.3 1/h") as a pint Quantity of ``kind``.

    Raises ValueError with a message for the user (what was expected, an example).
    """
    k = KINDS[kind]
    if isinstance(value, bool):  # YAML's yes/no/true/false/on/off
        raise ValueError(f"a yes/no value (read as {str(value).lower()}) is not a {k.name.replace('_', ' ')} "
                         f"like '{k.example}'")
    if value is None:
        raise ValueError(f"expected a {k.name.replace('_', ' ')} like '{k.example}', got nothing (null)")
    if isinstance(value, (int, float)):
        q = UREG.Quantity(float(value), _default_units(k.default_unit))
    elif isinstance(value, str):
        m = _QUANTITY_RE.match(value)
        if not m:
            raise ValueError(
                f"expected a number with a unit like '{k.example}', got {value!r}"
            )
        unit = m.group("unit")
        if unit:
            _check_unit_text(unit)
            units = _parse_units(unit)
        else:
            units = _default_units(k.default_unit)
        q = UREG.Quantity(float(m.group("num")), units)
    else:
        raise ValueError(f"expected a {k.name.replace('_', ' ')} like '{k.example}', got {type(value).__name__}")
    if not math.isfinite(q.magnitude):
        raise ValueError(f"{value!r} is not a finite number")
    if not k.accepts(q):
        raise ValueError(
            f"{value!r} has dimension {describe(q.dimensionality)}, expected a {k.name.replace('_', ' ')} "
            f"like '{k.example}'"
        )
    return q


@functools.lru_cache(maxsize=64)
def _default_units(text: str):
    return UREG.parse_units(text or "")


def _units_of(name: str):
    try:
        return UREG.parse_units(name)._units
    except Exception:  # noqa: BLE001 - unknown names are reported by the caller
        return {}


@functools.lru_cache(maxsize=512)
def _parse_units(text: str):
    """pint units of ``text`` (already checked by :func:`_check_unit_text`), cached:
    a long schedule repeats the same few units thousands of times."""
    try:
        units = UREG.parse_units(text.replace("^", "**"))
    except Exception as exc:  # pint raises several types
        raise ValueError(f"unknown unit {text!r} ({exc.__class__.__name__})") from None
    _check_unit_names(units, text)
    return units


_WORDS = {"L": "a volume", "g": "a mass", "h": "a time", "L/h": "a flow", "g/L": "a mass concentration",
          "mmol/L": "a molar concentration", "1/h": "a specific rate", "W": "a power", "mmol/L/h": "a volumetric rate"}


def describe(dimensionality) -> str:
    """pint's dimension text, with a word for the common ones: '[length] ** 3 (a volume)'."""
    if len(dimensionality) == 1 and list(dimensionality.values())[0] == 1:
        return f"{dimensionality}"  # '[mass]' says it already
    word = next((w for u, w in _WORDS.items() if _dim(u) == dimensionality), "")
    return f"{dimensionality}" + (f" ({word})" if word else "")


def written_unit(value, kind: str) -> str:
    """The unit as the user wrote it in ``value`` ('200 mL/h' -> 'mL/h'), or the
    default unit of ``kind`` for a bare number ('' for kind 'any')."""
    if isinstance(value, str):
        m = _QUANTITY_RE.match(value)
        if m and m.group("unit"):
            return m.group("unit")
    return KINDS[kind].default_unit


def internal_units(dimensionality):
    """The coherent internal unit (pint Unit) for a dimensionality."""
    unit = UREG.parse_units("")
    for dim, power in dimensionality.items():
        if dim not in _BASE:
            raise ValueError(f"dimension {dim} has no internal unit")
        unit = unit * UREG.parse_units(_BASE[dim]) ** power
    return unit


def to_internal(q) -> float:
    """Magnitude of pint Quantity ``q`` in the coherent internal units.

    Raises ValueError for a quantity that cannot be converted (an offset unit) or
    whose converted value is not a finite number (1e308 days in hours)."""
    try:
        value = float(q.magnitude) * _internal_factor(q.units)
    except pint.errors.OffsetUnitCalculusError:
        raise ValueError(f"'{q}' uses a temperature with an offset; write K, or delta_degC for a difference") from None
    if not math.isfinite(value):
        raise ValueError(f"'{q:~}' is too large: in optfeed's internal units it is not a finite number")
    return value


@functools.lru_cache(maxsize=512)
def _internal_factor(units) -> float:
    """Internal value of 1 ``units`` (cached: a long schedule repeats a few units)."""
    return float(UREG.Quantity(1.0, units).to(internal_units(units.dimensionality)).magnitude)


@functools.lru_cache(maxsize=512)
def factor_to(unit: str) -> float:
    """Multiply an internal value by this to express it in ``unit`` (cached: reports
    of many runs ask for the same few units)."""
    u = UREG.parse_units(unit)
    return float(UREG.Quantity(1.0, internal_units(u.dimensionality)).to(u).magnitude)


def unit_text(q) -> str:
    """Short text of a quantity's unit, as the user would write it."""
    text = f"{q.units:~}"
    return text.replace(" ", "")
