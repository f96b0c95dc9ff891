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


# -- temperature, position, length, other pressure units; what passes through ---------


def test_temperature_scales() -> None:
    # °F: water freezes at 32 °F and boils at 212 °F (1 atm) — t/°C = (t/°F − 32)/1.8
    # (NIST SP 811, B.9); K: 0 °C = 273.15 K exactly (SI Brochure, 9th ed., 2.3.1)
    assert to_si([32.0, 212.0], "degF", "temperature").tolist() == pytest.approx([0.0, 100.0])
    assert to_si([273.15, 298.15], "K", "temperature").tolist() == pytest.approx([0.0, 25.0])
    assert to_si([21.5], "degC", "temperature")[0] == pytest.approx(21.5, rel=1e-15)


def test_percent_position_and_speed_are_fractions() -> None:
    # % = 0.01 (SI Brochure, 9th ed., 5.4.7)
    for unit in ("%", "percent"):
        assert to_si([0.0, 60.0, 100.0], unit, "position").tolist() == pytest.approx(
            [0.0, 0.6, 1.0])
    assert to_si([87.5], "percent", "speed")[0] == pytest.approx(0.875)


def test_feet_and_inches_of_level() -> None:
    # international foot 0.3048 m, inch 0.0254 m exactly (NIST SP 811, B.9)
    assert to_si([10.0], "ft", "level")[0] == pytest.approx(3.048, rel=1e-12)
    assert to_si([12.0], "inch", "length")[0] == pytest.approx(0.3048, rel=1e-12)


def test_kilopascal_millibar_and_absolute_kilopascal() -> None:
    assert to_si([250.0], "kPa", "pressure")[0] == pytest.approx(2.5e5)
    assert to_si([250.0], "kPag", "pressure")[0] == pytest.approx(2.5e5)
    assert to_si([1013.25], "mbar", "pressure")[0] == pytest.approx(101_325.0)
    # 101.325 kPa absolute is one standard atmosphere: gauge zero (CGPM 1954)
    assert to_si([101.325], "kPaa", "pressure")[0] == pytest.approx(0.0, abs=1e-9)
    assert to_si([1.0], "psig", "pressure")[0] == pytest.approx(6894.757, rel=1e-6)


def test_missing_values_stay_missing_and_shapes_are_kept() -> None:
    # a NaN (a reading the historian did not have) is never turned into a number
    out = to_si([[1.0, float("nan")], [2.0, 3.0]], "m3/h", "flow")
    assert out.shape == (2, 2)
    assert out[0, 1] != out[0, 1]  # NaN
    assert out[1, 1] == pytest.approx(3.0 / 3600.0)
    back = from_si(out, "m3/h", "flow")
    assert back[0, 1] != back[0, 1] and back[1, 0] == pytest.approx(2.0)


@pytest.mark.parametrize(("unit", "kind"), [("degC", "pressure"), ("bar", "flow"),
                                            ("furlongs/fortnight", "flow"), ("m3/h", "level")])
def test_a_unit_of_the_wrong_kind_is_refused_with_both_units_named(unit: str, kind: str) -> None:
    with pytest.raises(UnitError) as info:
        to_si([1.0], unit, kind)
    text = str(info.value)
    assert repr(unit) in text and f"a {kind} unit" in text


@pytest.mark.parametrize(("unit", "kind"), [("bar", "pressure"), ("psia", "pressure"),
                                            ("kPaa", "pressure"), ("gpm", "flow"),
                                            ("L/m", "flow"), ("K", "temperature"),
                                            ("percent", "position"), ("ft", "level")])
def test_from_si_is_the_inverse_of_to_si(unit: str, kind: str) -> None:
    values = [0.0, 0.5, 3.25, 120.0]
    assert from_si(to_si(values, unit, kind), unit, kind).tolist() == pytest.approx(
        values, rel=1e-12, abs=1e-9)
