"""The Darcy friction factor of full pipe flow, vectorised over numpy arrays.

`friction_factor` gives f at any Reynolds number: laminar below `RE_LAMINAR`
(Hagen–Poiseuille), Colebrook (1939) above `RE_TURBULENT`, solved exactly by Clamond's
iteration (`colebrook_clamond`), and a linear interpolation in Re in between.
`friction_factor_slope` gives f with its log-slope d ln f / d ln Re, for the Newton
steps of the branch solver (`model.inverse`). `model.elements.Pipe` uses f in
Darcy–Weisbach.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

__all__ = [
    "RE_LAMINAR",
    "RE_TURBULENT",
    "colebrook_clamond",
    "friction_factor",
    "friction_factor_slope",
]

RE_LAMINAR = 2000.0  # below: Hagen–Poiseuille, f = 64/Re
RE_TURBULENT = 4000.0  # above: Colebrook; between, f is interpolated linearly in Re


def colebrook_clamond(re: npt.ArrayLike, rel_roughness: npt.ArrayLike) -> np.ndarray:
    """Darcy friction factor from the Colebrook equation, Clamond's solution, vectorised.

    Solves 1/√f = −2·log10(ε/(3.7·D) + 2.51/(Re·√f)) to machine precision with the
    two-step iteration of Clamond (2009), Ind. Eng. Chem. Res. 48, 3665 (the same
    algorithm as `fluids.Clamond`, written here over numpy arrays).

    Parameters
    ----------
    re : array_like
        Reynolds number, > 0 [-].
    rel_roughness : array_like
        Relative roughness ε/D, >= 0 [-].

    Returns
    -------
    ndarray
        Darcy friction factor [-].

    >>> round(float(colebrook_clamond(1e5, 1e-4)), 6)
    0.018514
    """
    re_a = np.asarray(re, dtype=float)
    ed = np.asarray(rel_roughness, dtype=float)
    x1 = ed * re_a * 0.12396818633541755  # ln(10)/18.574
    x2 = np.log(re_a) - 0.7793974884556819  # ln(ln(10)/5.02)
    f = x2 - 0.2
    x1f = x1 + f
    x1f1 = 1.0 + x1f
    e = (np.log(x1f) - 0.2) / x1f1
    f = f - (x1f1 + 0.5 * e) * e * x1f / (x1f1 + e * (1.0 + e / 3.0))
    x1f = x1 + f
    x1f1 = 1.0 + x1f
    e = (np.log(x1f) + f - x2) / x1f1
    b = x1f1 + e * (1.0 + e / 3.0)
    f = b / (b * f - (x1f1 + 0.5 * e) * e * x1f)
    return np.asarray(1.3254745276195995 * f * f)  # (ln(10)/2)^2


def friction_factor(re: npt.ArrayLike, rel_roughness: npt.ArrayLike) -> np.ndarray:
    """Darcy friction factor for full pipe flow at any Reynolds number [-].

    Laminar (Re <= 2000): f = 64/Re (Hagen–Poiseuille). Turbulent (Re >= 4000):
    Colebrook (1939), solved exactly (`colebrook_clamond`). In between, f is
    interpolated linearly in Re between the two ends; that keeps ΔP(Q) continuous and
    increasing, which the branch's root finder relies on. Re = 0 gives f = inf (ΔP is
    then taken as 0 by the callers since the velocity is 0).

    Parameters
    ----------
    re : array_like
        Reynolds number, >= 0 [-].
    rel_roughness : array_like
        Relative roughness ε/D, >= 0 [-].

    Returns
    -------
    ndarray
        Darcy friction factor [-].

    >>> friction_factor([1000.0, 1e5], 0.0).round(6).tolist()
    [0.064, 0.01799]
    """
    re_a = np.asarray(re, dtype=float)
    ed = np.asarray(rel_roughness, dtype=float)
    turb = colebrook_clamond(np.maximum(re_a, RE_TURBULENT), ed)
    if re_a.size and np.min(re_a) >= RE_TURBULENT:  # the usual case in cooling water
        return turb
    f4000 = colebrook_clamond(RE_TURBULENT, ed)
    w = np.clip((re_a - RE_LAMINAR) / (RE_TURBULENT - RE_LAMINAR), 0.0, 1.0)
    trans = (1.0 - w) * (64.0 / RE_LAMINAR) + w * f4000
    with np.errstate(divide="ignore"):
        lam = 64.0 / re_a
    return np.asarray(
        np.where(re_a >= RE_TURBULENT, turb, np.where(re_a <= RE_LAMINAR, lam, trans))
    )


def friction_factor_slope(
    re: npt.ArrayLike, rel_roughness: npt.ArrayLike
) -> tuple[np.ndarray, np.ndarray]:
    """Darcy friction factor and its log-slope d ln f / d ln Re [-], vectorised.

    Turbulent: differentiating Colebrook, 1/√f = −2·log10(u), u = ε/(3.7D) + 2.51/(Re√f),
    gives d ln f/d ln Re = −2c/(1 + c) with c = (2/ln 10)·2.51/(Re·ε/(3.7D) + 2.51/√f).
    Laminar: −1. Transition: the slope of the linear interpolation (`friction_factor`).
    The branch solver uses it for Newton steps on ln Q.

    >>> f, s = friction_factor_slope([1000.0, 1e5], 0.0)
    >>> s.round(4).tolist()
    [-1.0, -0.2087]
    """
    re_a = np.asarray(re, dtype=float)
    ed = np.asarray(rel_roughness, dtype=float)
    f = colebrook_clamond(np.maximum(re_a, RE_TURBULENT), ed)
    with np.errstate(divide="ignore", invalid="ignore"):
        c = (2.0 / math.log(10.0) * 2.51) / (re_a * ed / 3.7 + 2.51 / np.sqrt(f))
    slope = -2.0 * c / (1.0 + c)
    if not np.any(re_a < RE_TURBULENT):  # the usual case: no laminar or transitional flow
        return f, slope
    # laminar and transitional points only: few, so index them instead of computing all
    shape = np.broadcast(re_a, ed).shape
    low = np.broadcast_to(re_a < RE_TURBULENT, shape)
    f, slope = np.array(np.broadcast_to(f, shape)), np.array(np.broadcast_to(slope, shape))
    re_l = np.broadcast_to(re_a, shape)[low]
    ed_l = np.broadcast_to(ed, shape)[low]
    f4000 = colebrook_clamond(RE_TURBULENT, ed_l)
    w = np.clip((re_l - RE_LAMINAR) / (RE_TURBULENT - RE_LAMINAR), 0.0, 1.0)
    lam = re_l <= RE_LAMINAR
    with np.errstate(divide="ignore", invalid="ignore"):
        f_l = np.where(lam, 64.0 / re_l, (1.0 - w) * (64.0 / RE_LAMINAR) + w * f4000)
        s_l = np.where(
            lam, -1.0, re_l * (f4000 - 64.0 / RE_LAMINAR) / (RE_TURBULENT - RE_LAMINAR) / f_l
        )
    f[low] = f_l
    slope[low] = s_l
    return f, slope
