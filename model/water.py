"""Liquid water at atmospheric pressure: density and dynamic viscosity, 0–100 °C.

Fast explicit formulations, vectorised over numpy arrays:

* density — Kell (1975), the rational polynomial for air-free water at 1 atm::

      ρ(t) = (a0 + a1·t + a2·t² + a3·t³ + a4·t⁴ + a5·t⁵) / (1 + b·t)      [kg/m^3]

  with t on IPTS-68; ITS-90 temperatures are converted with t68 = 1.00024·t90
  (Saunders 1990, valid to within a few mK over 0–100 °C). It agrees with IAPWS-95 at
  0.101325 MPa to better than 0.002 % over 0–100 °C (checked in the tests against the
  `iapws` package).
* viscosity — the IAPWS 2008 formulation (Huber et al. 2009, J. Phys. Chem. Ref. Data
  38, 101) without the critical enhancement (μ2 = 1, which the release allows for
  industrial use away from the critical point), evaluated with the Kell density.

Pressure dependence is neglected: at 10 bar gauge water is ~0.05 % denser, far below
what a plant flow meter resolves.

>>> round(float(density(20.0)), 3)
998.203
>>> round(float(viscosity(20.0)) * 1e3, 4)
1.0016
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import numpy.typing as npt

__all__ = ["T_MAX_C", "T_MIN_C", "G", "density", "viscosity"]

#: Standard acceleration of gravity [m/s^2] (CGPM 1901, exact by definition).
G = 9.80665

#: Range of validity of this module [°C].
T_MIN_C = 0.0
T_MAX_C = 100.0

# Kell (1975), J. Chem. Eng. Data 20, 97, eq. 16 (density at 1 atm, IPTS-68).
_KELL_NUM = (
    999.83952,
    16.945176,
    -7.9870401e-3,
    -46.170461e-6,
    105.56302e-9,
    -280.54253e-12,
)
_KELL_DEN = 16.879850e-3

# IAPWS 2008 viscosity, reference constants and coefficients (Tables 1 and 2).
_T_CRIT_K = 647.096
_RHO_CRIT = 322.0
_MU_REF = 1.0e-6  # Pa·s
_H0 = (1.67752, 2.20462, 0.6366564, -0.241605)
# H_ij as a 6 x 7 matrix, rows i = 0..5 (powers of 1/T̄ - 1), columns j = 0..6.
_H1 = np.zeros((6, 7))
for _i, _j, _h in (
    (0, 0, 5.20094e-1), (1, 0, 8.50895e-2), (2, 0, -1.08374), (3, 0, -2.89555e-1),
    (0, 1, 2.22531e-1), (1, 1, 9.99115e-1), (2, 1, 1.88797), (3, 1, 1.26613),
    (5, 1, 1.20573e-1), (0, 2, -2.81378e-1), (1, 2, -9.06851e-1), (2, 2, -7.72479e-1),
    (3, 2, -4.89837e-1), (4, 2, -2.57040e-1), (0, 3, 1.61913e-1), (1, 3, 2.57399e-1),
    (0, 4, -3.25372e-2), (3, 4, 6.98452e-2), (4, 5, 8.72102e-3), (3, 6, -4.35673e-3),
    (5, 6, -5.93264e-4),
):  # fmt: skip
    _H1[_i, _j] = _h


def _checked_temperature(temperature_c: npt.ArrayLike) -> np.ndarray:
    t = np.asarray(temperature_c, dtype=float)
    bad = ~((t >= T_MIN_C) & (t <= T_MAX_C))  # also catches NaN
    if np.any(bad):
        worst = float(t[bad].flat[0]) if t.ndim else float(t)
        raise ValueError(
            f"temperature_c must lie within {T_MIN_C:g}–{T_MAX_C:g} °C (liquid water at "
            f"1 atm); got {worst!r}"
        )
    return t


def _kell(t90: np.ndarray) -> np.ndarray:
    t = 1.00024 * t90  # ITS-90 -> IPTS-68, Saunders (1990)
    num = np.full_like(t, _KELL_NUM[5])
    for a in _KELL_NUM[4::-1]:
        num = num * t + a
    return np.asarray(num / (1.0 + _KELL_DEN * t))


@lru_cache(maxsize=1024)
def _scalar(t: float) -> tuple[float, float]:
    # A site runs at a handful of temperatures; the branch solver asks for the same
    # one again and again: answer scalars from a cache.
    ta = _checked_temperature(t)
    rho = _kell(ta)
    return float(rho), float(_viscosity_from(ta, rho))


def density(temperature_c: npt.ArrayLike) -> np.ndarray:
    """Density of liquid water at 1 atm, Kell (1975).

    Parameters
    ----------
    temperature_c : array_like
        Temperature, 0–100 [°C].

    Returns
    -------
    ndarray
        Density [kg/m^3], same shape as *temperature_c*.

    Raises
    ------
    ValueError
        If any temperature lies outside 0–100 °C or is NaN.

    >>> density([4.0, 50.0]).round(2).tolist()
    [999.97, 988.03]
    """
    if isinstance(temperature_c, float | int) or np.ndim(temperature_c) == 0:
        return np.asarray(_scalar(float(temperature_c))[0])  # type: ignore[arg-type]
    return _kell(_checked_temperature(temperature_c))


def _viscosity_from(t_c: np.ndarray, rho: np.ndarray) -> np.ndarray:
    tr = (t_c + 273.15) / _T_CRIT_K
    dr = rho / _RHO_CRIT
    mu0 = 100.0 * np.sqrt(tr) / (_H0[0] + _H0[1] / tr + _H0[2] / tr**2 + _H0[3] / tr**3)
    x = 1.0 / tr - 1.0
    y = dr - 1.0
    # Horner in both variables: sum_i x^i * sum_j H_ij y^j
    inner = np.zeros_like(np.broadcast_to(x, np.broadcast(x, y).shape), dtype=float)
    for i in range(5, -1, -1):
        row = _H1[i, 6]
        for j in range(5, -1, -1):
            row = row * y + _H1[i, j]
        inner = inner * x + row
    return np.asarray(_MU_REF * mu0 * np.exp(dr * inner))


def viscosity(temperature_c: npt.ArrayLike) -> np.ndarray:
    """Dynamic viscosity of liquid water at 1 atm, IAPWS 2008 (μ2 = 1).

    Parameters
    ----------
    temperature_c : array_like
        Temperature, 0–100 [°C].

    Returns
    -------
    ndarray
        Dynamic viscosity [Pa·s], same shape as *temperature_c*.

    Raises
    ------
    ValueError
        If any temperature lies outside 0–100 °C or is NaN.

    >>> (viscosity([5.0, 40.0]) * 1e3).round(4).tolist()
    [1.5182, 0.6527]
    """
    if isinstance(temperature_c, float | int) or np.ndim(temperature_c) == 0:
        return np.asarray(_scalar(float(temperature_c))[1])  # type: ignore[arg-type]
    t = _checked_temperature(temperature_c)
    return _viscosity_from(t, _kell(t))
