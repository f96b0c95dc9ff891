"""The Darcy friction factor against a published table, an independent solve and `fluids`."""

from __future__ import annotations

import math

import fluids
import numpy as np
import pytest
from scipy.optimize import brentq

from model.friction import colebrook_clamond, friction_factor, friction_factor_slope


@pytest.mark.parametrize(
    ("re", "ed", "f_ref"),
    [
        (1e4, 0.0, 0.030883),  # REFERENCES.md, Colebrook solution (Moody 1944)
        (1e5, 0.0, 0.017990),
        (1e5, 1e-4, 0.018514),
        (1e6, 1e-4, 0.013441),
        (1e5, 1e-3, 0.022175),
        (1e6, 1e-3, 0.019943),
        (4000.0, 0.01, 0.049082),
    ],
)
def test_colebrook_table(re: float, ed: float, f_ref: float) -> None:
    # the table is rounded to 6 decimals
    assert float(friction_factor(re, ed)) == pytest.approx(f_ref, abs=5.01e-7)


def colebrook_brentq(re: float, ed: float) -> float:
    # Colebrook (1939) in its implicit form, solved independently with scipy's brentq
    def g(f: float) -> float:
        return 1.0 / math.sqrt(f) + 2.0 * math.log10(ed / 3.7 + 2.51 / (re * math.sqrt(f)))

    return float(brentq(g, 1e-4, 1.0, xtol=1e-15, rtol=1e-14))


def test_colebrook_against_independent_brentq_solve() -> None:
    rng = np.random.default_rng(7)
    res = 10 ** rng.uniform(np.log10(4000.0), 8.0, 200)
    eds = np.concatenate([np.zeros(50), 10 ** rng.uniform(-6.0, -1.3, 150)])
    ours = colebrook_clamond(res, eds)
    for re, ed, f in zip(res, eds, ours, strict=True):
        assert f == pytest.approx(colebrook_brentq(re, ed), rel=1e-12)


def test_colebrook_matches_fluids_clamond() -> None:
    # fluids.Clamond is the scalar reference of the same algorithm (Clamond 2009)
    for re, ed in [(5e3, 0.0), (2e5, 3e-4), (1e7, 1e-5)]:
        assert float(colebrook_clamond(re, ed)) == pytest.approx(fluids.Clamond(re, ed), rel=1e-14)


def test_laminar_and_transition() -> None:
    # Hagen–Poiseuille: f = 64/Re (REFERENCES.md)
    re = np.array([10.0, 500.0, 1999.0])
    assert friction_factor(re, 1e-4) == pytest.approx(64.0 / re, rel=1e-14)
    # transition: continuous at both ends and f·Re² (∝ ΔP) increasing
    re = np.linspace(1900.0, 4100.0, 2201)
    f = friction_factor(re, 1e-3)
    assert np.all(np.diff(f * re**2) > 0)
    assert float(friction_factor(2000.0, 1e-3)) == pytest.approx(0.032, rel=1e-12)
    assert float(friction_factor(4000.0 - 1e-9, 1e-3)) == pytest.approx(
        float(friction_factor(4000.0, 1e-3)), rel=1e-9
    )


def test_friction_factor_slope_against_finite_differences() -> None:
    # d ln f / d ln Re: analytic derivative of Colebrook vs a central difference of the
    # exact solution (our own check; away from the 2000/4000 kinks)
    re = np.array([50.0, 1500.0, 2500.0, 3500.0, 5e3, 3e4, 2e5, 5e6])
    for ed in (0.0, 1e-4, 3e-3):
        f, s = friction_factor_slope(re, ed)
        assert f == pytest.approx(friction_factor(re, ed), rel=1e-15)
        h = 1e-6
        up = np.log(friction_factor(re * (1 + h), ed))
        down = np.log(friction_factor(re * (1 - h), ed))
        fd = (up - down) / (math.log1p(h) - math.log1p(-h))
        assert s == pytest.approx(fd, rel=1e-5, abs=1e-8)
    # broadcasting of a scalar Re against several roughnesses
    f, s = friction_factor_slope(3000.0, np.array([1e-4, 1e-3]))
    assert f.shape == s.shape == (2,)
