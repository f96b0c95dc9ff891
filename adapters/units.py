"""Plant units to SI, once, where data enters.

Inside branchwatch every quantity is SI: pressure in Pa *gauge*, flow in m³/s, length in
m, temperature in °C (named ``temperature_c``), density kg/m³, viscosity Pa·s. Plant data
and config files speak bar, psi, m³/h, gpm, inches, °F; this module turns them into SI
with `pint`, so the unit arithmetic is done by a library that knows the definitions
rather than by constants typed from memory.

Gauge pressure: a tag in ``bar`` or ``barg`` is read as gauge (what plant transmitters
report); ``bara``/``psia`` are absolute and are converted to gauge by subtracting one
standard atmosphere (101 325 Pa).

>>> parse_quantity("0.5 bar", "Pa")
50000.0
>>> round(parse_quantity("140 m3/h", "m3/s"), 6)
0.038889
>>> to_si([0.0, 1.0], "bar", "pressure").tolist()
[0.0, 100000.0]
>>> to_si([68.0], "degF", "temperature").round(3).tolist()
[20.0]
"""

from __future__ import annotations

from collections.abc import Callable
from functools import lru_cache
from typing import Any

import numpy as np
import numpy.typing as npt
import pint

__all__ = [
    "SI_UNITS",
    "UnitError",
    "converter",
    "from_si",
    "parse_quantity",
    "pressure_labels",
    "to_si",
    "ureg",
]

ATMOSPHERE_PA = 101_325.0  # standard atmosphere, exact by definition

ureg: pint.UnitRegistry = pint.UnitRegistry(autoconvert_offset_to_baseunit=True)
ureg.define("barg = bar")
ureg.define("psig = psi")
ureg.define("kPag = kPa")
ureg.define("mbarg = mbar")
# Absolute pressure units are only converted to gauge through `to_si`; defined here so
# that they parse.
ureg.define("bara = bar")
ureg.define("psia = psi")
ureg.define("kPaa = kPa")
ureg.define("m3 = meter**3")
ureg.define("gpm = gallon / minute = GPM = usgpm = USgpm")
# What flow meters and historians write for litres per minute and per second, defined on
# the library's own litre and minute (no factor typed here).
ureg.define("lpm = liter / minute = LPM = Lpm")
ureg.define("lps = liter / second = LPS")
ureg.define("m3h = meter ** 3 / hour = cmh = CMH")

#: Spellings that parse as something else: meter displays write "l/m" for litres per
#: minute, which would otherwise read as litres per metre.
_SPELLINGS = {"l/m": "l/min", "L/m": "L/min", "ltr/min": "l/min", "m3/hr": "m3/h"}

#: The SI unit used inside the model for each kind of quantity a tag can carry.
SI_UNITS: dict[str, str] = {
    "pressure": "Pa",
    "flow": "m**3/s",
    "temperature": "degC",
    "level": "m",
    "length": "m",
    "position": "dimensionless",
    "speed": "dimensionless",
    "power": "W",
}

_ABSOLUTE = {"bara", "psia", "kPaa"}
#: Pressure units whose name says gauge or absolute, and the plain unit of a difference
#: of two such pressures (a difference is neither gauge nor absolute).
_MARKED = {"barg": "bar", "psig": "psi", "kPag": "kPa", "mbarg": "mbar",
           "bara": "bar", "psia": "psi", "kPaa": "kPa"}  # fmt: skip


class UnitError(ValueError):
    """A unit string that does not parse, or does not convert to the quantity asked."""


@lru_cache(maxsize=512)
def converter(unit: str, kind_or_si: str) -> Callable[[npt.ArrayLike], np.ndarray]:
    """A function that turns values in *unit* into the SI unit of *kind_or_si*.

    *kind_or_si* is a quantity kind from `SI_UNITS` (``"pressure"``) or a unit string.
    Raises `UnitError` naming both units when they do not convert.
    """
    target = SI_UNITS.get(kind_or_si, kind_or_si)
    unit = unit.strip()
    if unit in ("%", "percent"):
        unit = "percent"
    unit = _SPELLINGS.get(unit, unit)
    try:
        src = ureg.Unit(unit)
        dst = ureg.Unit(target)
        ureg.Quantity(1.0, src).to(dst)
    except (pint.errors.PintError, AttributeError, TypeError, ValueError) as exc:
        what = f" (a {kind_or_si} unit)" if kind_or_si in SI_UNITS else ""
        raise UnitError(
            f"unit {unit!r} does not convert to {target!r}{what}: {exc}"
        ) from exc
    offset = -ATMOSPHERE_PA if unit in _ABSOLUTE and target == "Pa" else 0.0

    def convert(values: npt.ArrayLike) -> np.ndarray:
        arr = np.asarray(values, dtype=float)
        out = ureg.Quantity(arr, src).to(dst).magnitude
        return np.asarray(out, dtype=float) + offset

    return convert


def from_si(values: npt.ArrayLike, unit: str, kind_or_si: str) -> np.ndarray:
    """The inverse of `to_si`: SI values of *kind_or_si* expressed in *unit*.

    >>> from_si([100000.0], "bar", "pressure").tolist()
    [1.0]
    """
    arr = np.asarray(values, dtype=float)
    forward = converter(unit, kind_or_si)
    # every conversion here is affine: v_si = a·v + b
    b = float(forward(0.0))
    a = float(forward(1.0)) - b
    return (arr - b) / a


def to_si(values: npt.ArrayLike, unit: str, kind_or_si: str) -> np.ndarray:
    """Convert *values* given in *unit* to the SI unit of *kind_or_si* (see `converter`)."""
    return converter(unit, kind_or_si)(values)


def pressure_labels(unit: str) -> tuple[str, str]:
    """How a text names pressures read in *unit*: the words after a pressure, and the
    unit of a difference of two pressures. A unit whose name does not say absolute is
    read as gauge (see the module docstring), and the text says so.

    >>> pressure_labels("bar"), pressure_labels("barg"), pressure_labels("kPaa")
    (('bar gauge', 'bar'), ('barg', 'bar'), ('kPaa', 'kPa'))
    """
    unit = unit.strip()
    if unit in _MARKED:
        return unit, _MARKED[unit]
    return f"{unit} gauge", unit


def parse_quantity(text: str | float | int, si_unit: str) -> float:
    """Parse a config quantity such as ``"110 m"`` or ``"0.5 bar"`` into *si_unit*.

    A bare number is taken as already in *si_unit*. Raises `UnitError` with the text and
    the expected unit when it does not parse or convert.
    """
    if isinstance(text, bool):
        raise UnitError(f"expected a quantity in {si_unit}, got {text!r}")
    if isinstance(text, int | float):
        return float(text)
    try:
        q: Any = ureg.Quantity(text.strip())
    except (pint.errors.PintError, AttributeError, TypeError, ValueError) as exc:
        raise UnitError(f"{text!r} is not a quantity with a unit ({exc})") from exc
    try:
        return float(converter(str(q.units), si_unit)(q.magnitude))
    except UnitError:
        raise UnitError(f"{text!r} does not convert to {si_unit!r}") from None
