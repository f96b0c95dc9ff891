"""Water properties against IAPWS-95 / IAPWS 2008 (the `iapws` package) and REFERENCES.md."""

from __future__ import annotations

import numpy as np
import pytest
from iapws import IAPWS95
from iapws._iapws import _Viscosity

from model import water

P_ATM_MPA = 0.101325


@pytest.mark.slow
def test_density_matches_iapws95_within_0_02_percent() -> None:
    temps = np.linspace(0.5, 99.5, 23)
    ours = water.density(temps)
    for t, rho in zip(temps, ours, strict=True):
        ref = IAPWS95(T=t + 273.15, P=P_ATM_MPA).rho  # IAPWS-95 via the iapws package
        assert rho == pytest.approx(ref, rel=2e-4)


@pytest.mark.slow
def test_viscosity_matches_iapws2008_within_0_5_percent() -> None:
    temps = np.linspace(0.5, 99.5, 23)
    ours = water.viscosity(temps)
    for t, mu in zip(temps, ours, strict=True):
        st = IAPWS95(T=t + 273.15, P=P_ATM_MPA)
        # IAPWS 2008 viscosity at the IAPWS-95 density, via the iapws package
        ref = _Viscosity(st.rho, t + 273.15)
        assert mu == pytest.approx(ref, rel=5e-3)


@pytest.mark.parametrize(
    ("t", "rho", "mu_mpas"),
    [
        (5.0, 999.967, 1.5182),  # REFERENCES.md: IAPWS-95 / IAPWS 2008 at 0.101325 MPa
        (20.0, 998.207, 1.0016),  # REFERENCES.md
        (40.0, 992.216, 0.6527),  # REFERENCES.md
    ],
)
def test_reference_values(t: float, rho: float, mu_mpas: float) -> None:
    assert float(water.density(t)) == pytest.approx(rho, rel=2e-4)
    assert float(water.viscosity(t)) * 1e3 == pytest.approx(mu_mpas, rel=5e-3)


def test_density_maximum_near_4_c() -> None:
    # Water is densest at 3.98 °C (common practice; Kell 1975 gives 3.98 °C).
    t = np.linspace(0.0, 10.0, 1001)
    assert t[np.argmax(water.density(t))] == pytest.approx(3.98, abs=0.02)


def test_vectorised_shape_and_broadcast() -> None:
    t = np.array([[10.0, 20.0], [30.0, 40.0]])
    assert water.density(t).shape == (2, 2)
    assert water.viscosity(t).shape == (2, 2)
    assert np.all(np.diff(water.viscosity(np.linspace(0, 100, 50))) < 0)


@pytest.mark.parametrize("bad", [-1.0, 100.5, float("nan"), [20.0, 150.0]])
def test_out_of_range_names_the_argument(bad: object) -> None:
    with pytest.raises(ValueError, match="temperature_c"):
        water.density(bad)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="temperature_c"):
        water.viscosity(bad)  # type: ignore[arg-type]


def test_standard_gravity() -> None:
    # g_n = 9.80665 m/s² exactly (3rd CGPM, 1901); with it 10 m of water at 1000 kg/m³ is
    # 0.980665 bar (REFERENCES.md). The branch statics use this G (tests/model/test_branch.py
    # checks a 6 m rise against ≈ 0.6 bar through the branch model).
    assert water.G == 9.80665
