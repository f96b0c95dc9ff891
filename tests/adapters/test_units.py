"""The units boundary: plant units to SI, checked against the units' definitions.

References: the litre is 1e-3 m^3 exactly and the minute 60 s (SI Brochure, 9th ed., 2019,
table 8); the US gallon is 231 in^3 = 3.785411784 L exactly (NIST Handbook 44, appendix C);
the bar is 1e5 Pa exactly and the standard atmosphere 101 325 Pa (SI Brochure table 8 and
CGPM 1954); psi = 6894.757 Pa (NIST SP 811, appendix B.8).
"""

from __future__ import annotations

import pytest

from adapters.units import UnitError, from_si, parse_quantity, to_si

LITRE_PER_MIN = 1e-3 / 60.0  # SI Brochure: L = 1e-3 m^3, min = 60 s
US_GPM = 3.785411784e-3 / 60.0  # NIST Handbook 44: US gal = 3.785411784 L


@pytest.mark.parametrize("unit", ["L/min", "l/min", "lpm", "LPM", "Lpm", "l/m", "L/m"])
def test_litres_per_minute_in_the_spellings_meters_use(unit: str) -> None:
    # issue 12: meters write lpm, LPM, l/m; "l/m" must not read as litres per metre
    assert to_si([30.0], unit, "flow")[0] == pytest.approx(30 * LITRE_PER_MIN, rel=1e-12)


@pytest.mark.parametrize("unit", ["gpm", "GPM", "USgpm"])
def test_us_gallons_per_minute(unit: str) -> None:
    assert to_si([100.0], unit, "flow")[0] == pytest.approx(100 * US_GPM, rel=1e-12)


@pytest.mark.parametrize("unit", ["m3/h", "m³/h", "m3/hr", "cmh"])
def test_cubic_metres_per_hour(unit: str) -> None:
    assert to_si([3600.0], unit, "flow")[0] == pytest.approx(1.0, rel=1e-12)


def test_gauge_and_absolute_pressure() -> None:
    # bar = 1e5 Pa; absolute units lose one standard atmosphere (101 325 Pa)
    assert to_si([2.5], "bar", "pressure")[0] == pytest.approx(2.5e5)
    assert to_si([2.5], "barg", "pressure")[0] == pytest.approx(2.5e5)
    assert to_si([2.5], "bara", "pressure")[0] == pytest.approx(2.5e5 - 101_325.0)
    assert to_si([14.6959488], "psia", "pressure")[0] == pytest.approx(0.0, abs=0.01)
    assert to_si([1.0], "psi", "pressure")[0] == pytest.approx(6894.757, rel=1e-6)


def test_from_si_inverts_to_si_for_offset_units() -> None:
    for unit, kind in [("bara", "pressure"), ("degF", "temperature"), ("lpm", "flow")]:
        back = from_si(to_si([1.0, 7.5], unit, kind), unit, kind)
        assert back.tolist() == pytest.approx([1.0, 7.5], rel=1e-12)


def test_quantities_in_the_site_file() -> None:
    assert parse_quantity("30 lpm", "m3/s") == pytest.approx(30 * LITRE_PER_MIN)
    with pytest.raises(UnitError, match="does not convert"):
        parse_quantity("30 kg/s", "m3/s")
    with pytest.raises(UnitError, match="a flow unit"):
        to_si([1.0], "kg/s", "flow")
