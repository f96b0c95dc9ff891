"""Hydraulic elements of a branch: each gives its pressure drop ΔP(Q, T) for arrays of Q.

Every element is a frozen dataclass with::

    dp(q, *, temperature_c=20.0, position=None) -> ndarray      [Pa]

for flows ``q`` [m^3/s] (q >= 0); ``q``, ``temperature_c`` and ``position`` broadcast
against each other. ``position`` (0–1) is read only by `ControlValve`.

Elements: `Pipe` (Darcy–Weisbach, the Colebrook friction factor of `model.friction`),
`Fittings` (Crane TP-410 loss coefficients through `fluids`), `ControlValve`
(IEC 60534-2-1 non-choked liquid flow), `Equipment` (rated ΔP at a rated flow, power
law), `Elevation` (a static rise: no dynamic loss; `model.branch` adds ρ·g·Δz to the
branch's static pressure).

Inside, the branch solver calls ``_dp_props(q, rho, mu, position)`` with density and
viscosity computed once, so that a root finder does not recompute water properties at
every iteration.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar, Literal, Protocol, runtime_checkable

import fluids
import numpy as np
import numpy.typing as npt
from fluids.fittings import bend_rounded_Crane

from model import water
from model.friction import friction_factor

__all__ = [
    "FITTING_KEYS",
    "MATERIALS",
    "ControlValve",
    "Element",
    "Elevation",
    "Equipment",
    "Fittings",
    "Pipe",
]

M3H_PER_M3S = 3600.0
PA_PER_BAR = 1.0e5


@runtime_checkable
class Element(Protocol):
    """What a branch needs from an element."""

    def dp(
        self,
        q: npt.ArrayLike,
        *,
        temperature_c: npt.ArrayLike = 20.0,
        position: npt.ArrayLike | None = None,
    ) -> np.ndarray: ...

    def _dp_props(
        self,
        q: np.ndarray,
        rho: np.ndarray,
        mu: np.ndarray,
        position: np.ndarray | None,
    ) -> np.ndarray: ...


def _props(temperature_c: npt.ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    t = np.asarray(temperature_c, dtype=float)
    return water.density(t), water.viscosity(t)


class _Loss:
    """`dp` of every element: the conditions checked once, here, then the element's
    own `_dp_props`. Only a control valve reads a *position* (`_checked_position`)."""

    def _dp_props(
        self, q: np.ndarray, rho: np.ndarray, mu: np.ndarray, position: np.ndarray | None
    ) -> np.ndarray:
        raise NotImplementedError

    def _checked_position(self, position: npt.ArrayLike | None) -> np.ndarray | None:
        """The position the loss depends on: none (ignored) but for a control valve."""
        return None

    def dp(
        self,
        q: npt.ArrayLike,
        *,
        temperature_c: npt.ArrayLike = 20.0,
        position: npt.ArrayLike | None = None,
    ) -> np.ndarray:
        """Pressure drop [Pa] at flow *q* [m^3/s] and *temperature_c* [°C]; *position*
        [-] counts for a control valve only (default: its fixed position)."""
        rho, mu = _props(temperature_c)
        pos = self._checked_position(position)
        return self._dp_props(_checked_flow(q), rho, mu, pos)


def _checked_flow(q: npt.ArrayLike) -> np.ndarray:
    qa = np.asarray(q, dtype=float)
    if np.any(qa < 0) or np.any(np.isnan(qa)):
        raise ValueError("q must be >= 0 m^3/s and not NaN (flow in the design direction)")
    return qa


# --------------------------------------------------------------------------- pipe


def _roughness_farshad(name: str) -> Callable[[float], float]:
    return lambda d: float(fluids.roughness_Farshad(ID=name, D=d))


def _roughness_table(name: str) -> Callable[[float], float]:
    return lambda d: float(fluids.material_roughness(name))


#: Our material names -> roughness ε [m] as a function of inner diameter, looked up in
#: `fluids` by the table's exact key (fluids' own fuzzy matching maps "carbon steel"
#: to riveted steel, 1.1 mm, so we never pass it free text).
MATERIALS: Mapping[str, Callable[[float], float]] = {
    "carbon steel": _roughness_farshad("Carbon steel, bare"),  # Farshad & Rieke 2006
    "carbon steel honed": _roughness_farshad("Carbon steel, honed bare"),
    "stainless steel": _roughness_farshad("Cr13, bare"),
    "cement lined": _roughness_farshad("Cement lining"),
    "plastic lined": _roughness_farshad("Plastic coated"),
    "fiberglass lined": _roughness_farshad("Fiberglass lining"),
    "galvanized iron": _roughness_table("Galvanized iron"),
    "cast iron": _roughness_table("Cast iron"),
    "asphalted cast iron": _roughness_table("Asphalted cast iron"),
    "concrete": _roughness_table("Concrete"),
    "copper": _roughness_table("Brass"),  # drawn tubing, 1.5 µm
    "pvc": _roughness_table("Glass"),  # smooth plastic, drawn-tubing value
}


def _positive(name: str, value: float) -> None:
    if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a finite number > 0; got {value!r}")


@dataclass(frozen=True)
class Pipe(_Loss):
    """A straight run of round pipe, Darcy–Weisbach with the Colebrook friction factor.

    ΔP = f(Re, ε/D)·(L/D)·ρ·v²/2, v = 4Q/(πD²), Re = ρvD/μ (see `model.friction.friction_factor`).

    Parameters
    ----------
    length_m : float
        Length of pipe [m].
    inner_diameter_m : float
        Inner diameter [m].
    roughness_m : float
        Absolute roughness ε [m], >= 0.

    >>> p = Pipe(100.0, 0.1023, 4.5e-5)
    >>> round(float(p.dp(0.02)), -2)  # 2.43 m/s in 4" sch 40, f = 0.0181
    52400.0
    """

    length_m: float
    inner_diameter_m: float
    roughness_m: float

    def __post_init__(self) -> None:
        _positive("length_m", self.length_m)
        _positive("inner_diameter_m", self.inner_diameter_m)
        if not (math.isfinite(self.roughness_m) and self.roughness_m >= 0):
            raise ValueError(f"roughness_m must be >= 0; got {self.roughness_m!r}")
        if self.roughness_m > 0.05 * self.inner_diameter_m:
            # the Colebrook equation is fitted to ε/D up to 0.05 (the Moody chart's range)
            raise ValueError(
                f"roughness_m {self.roughness_m!r} is over 5 % of inner_diameter_m "
                f"{self.inner_diameter_m!r}: outside the Colebrook equation's range"
            )

    @classmethod
    def from_nominal(
        cls,
        length_m: float,
        nps: float,
        schedule: str = "40",
        material: str = "carbon steel",
    ) -> Pipe:
        """A pipe by nominal size and schedule (ASME B36.10/B36.19 through `fluids`).

        Parameters
        ----------
        length_m : float
            Length [m].
        nps : float
            Nominal pipe size [in], e.g. 4 or 1.5.
        schedule : str
            Schedule, e.g. "40", "80", "10S" [-].
        material : str
            One of `MATERIALS` [-].

        >>> round(Pipe.from_nominal(10.0, 4).inner_diameter_m, 4)
        0.1023
        """
        key = material.strip().lower()
        if key not in MATERIALS:
            raise ValueError(f"material {material!r} is not known; use one of {sorted(MATERIALS)}")
        try:
            # fluids types NPS as int, but takes fractional sizes (1.5, 2.5 ...)
            nps_arg: Any = nps
            _, di, _, _ = fluids.nearest_pipe(NPS=nps_arg, schedule=str(schedule))
        except Exception as exc:  # fluids raises bare ValueError/KeyError variants
            raise ValueError(f"nps={nps!r} schedule={schedule!r}: no such pipe ({exc})") from exc
        return cls(float(length_m), float(di), MATERIALS[key](float(di)))

    @property
    def area_m2(self) -> float:
        """Flow area [m^2]."""
        return math.pi * self.inner_diameter_m**2 / 4.0

    def velocity(self, q: npt.ArrayLike) -> np.ndarray:
        """Mean velocity [m/s] at flow *q* [m^3/s]."""
        return np.asarray(q, dtype=float) / self.area_m2

    def _dp_props(
        self, q: np.ndarray, rho: np.ndarray, mu: np.ndarray, position: np.ndarray | None
    ) -> np.ndarray:
        d = self.inner_diameter_m
        v = q * (1.0 / self.area_m2)
        re = (d * v) * (rho / mu)
        f = friction_factor(re, self.roughness_m / d)
        with np.errstate(invalid="ignore"):
            out = f * (0.5 * self.length_m / d) * rho * (v * v)
        if np.all(v > 0):
            return np.asarray(out)
        return np.asarray(np.where(v > 0, out, 0.0))


# --------------------------------------------------------------------------- fittings


def _ft(d: float) -> float:
    return float(fluids.ft_Crane(d))


# Loss coefficient K of one fitting of each kind at pipe inner diameter d [m]. Crane
# TP-410 gives most of them as K = n·f_T, f_T the fully turbulent friction factor of
# clean commercial steel pipe of that size (fluids computes f_T with `ft_Crane`).
_FITTINGS: dict[str, Callable[[float], float]] = {
    "elbow_90": lambda d: 30.0 * _ft(d),  # standard 90° elbow, Crane A-29: 30 f_T
    "elbow_45": lambda d: 16.0 * _ft(d),  # standard 45° elbow, Crane A-29: 16 f_T
    "bend_90": lambda d: float(bend_rounded_Crane(d, 90.0, bend_diameters=1.5)),
    "bend_45": lambda d: float(bend_rounded_Crane(d, 45.0, bend_diameters=1.5)),
    "tee_run": lambda d: 20.0 * _ft(d),  # flow through run, Crane A-29: 20 f_T
    "tee_branch": lambda d: 60.0 * _ft(d),  # flow through branch, Crane A-29: 60 f_T
    "gate_valve": lambda d: float(fluids.K_gate_valve_Crane(d, d, 0.0)),
    "globe_valve": lambda d: float(fluids.K_globe_valve_Crane(d, d)),
    "ball_valve": lambda d: float(fluids.K_ball_valve_Crane(d, d, 0.0)),
    "butterfly_valve": lambda d: float(fluids.K_butterfly_valve_Crane(d)),
    "plug_valve": lambda d: float(fluids.K_plug_valve_Crane(d, d, 0.0)),
    "check_valve_swing": lambda d: float(fluids.K_swing_check_valve_Crane(d, angled=True)),
    "check_valve_swing_clearway": lambda d: float(
        fluids.K_swing_check_valve_Crane(d, angled=False)
    ),
    "check_valve_lift": lambda d: float(fluids.K_lift_check_valve_Crane(d, d)),
    "entrance": lambda d: 0.5,  # sharp-edged entrance from a vessel, Crane A-29
    "exit": lambda d: float(fluids.exit_normal()),  # K = 1, all velocity head lost
}

#: The fitting names `Fittings` accepts as count keys.
FITTING_KEYS: tuple[str, ...] = tuple(sorted(_FITTINGS))
_CHECK_VALVES = frozenset(k for k in _FITTINGS if k.startswith("check_valve"))


@dataclass(frozen=True)
class Fittings(_Loss):
    """Fittings and manual valves at one pipe size, by kind and count.

    ΔP = (Σ count·K + extra_k)·ρv²/2 with v the velocity in a pipe of *diameter_m*.
    K from Crane TP-410 through `fluids` (see `FITTING_KEYS`); K does not depend on Re
    (Crane's fully turbulent values: conservative at low Re where real K rises, but
    cooling-water branches run well above Re 10^4).

    Parameters
    ----------
    diameter_m : float
        Inner diameter of the pipe the fittings sit in [m].
    counts : Mapping[str, int]
        Number of each kind of fitting, keys from `FITTING_KEYS` [-].
    extra_k : float
        A further loss coefficient for anything not listed (strainer, orifice …),
        on the same velocity [-].

    >>> f = Fittings(0.1023, {"elbow_90": 4, "gate_valve": 2})
    >>> round(f.k_total, 3)
    2.204
    """

    diameter_m: float
    counts: Mapping[str, int]
    extra_k: float = 0.0
    k_total: float = field(init=False)

    def __post_init__(self) -> None:
        _positive("diameter_m", self.diameter_m)
        if not (math.isfinite(self.extra_k) and self.extra_k >= 0):
            raise ValueError(f"extra_k must be >= 0; got {self.extra_k!r}")
        unknown = sorted(set(self.counts) - set(_FITTINGS))
        if unknown:
            raise ValueError(
                f"counts: unknown fitting {', '.join(map(repr, unknown))}; "
                f"known fittings are {', '.join(FITTING_KEYS)}"
            )
        for key, n in self.counts.items():
            if isinstance(n, bool) or not isinstance(n, int) or n < 0:
                raise ValueError(f"counts[{key!r}] must be a whole number >= 0; got {n!r}")
        object.__setattr__(self, "counts", dict(self.counts))
        d = self.diameter_m
        k = self.extra_k + sum(n * self.k_of(key, d) for key, n in self.counts.items())
        object.__setattr__(self, "k_total", float(k))

    @staticmethod
    def k_of(kind: str, diameter_m: float) -> float:
        """Loss coefficient K [-] of one fitting of *kind* at *diameter_m* [m]."""
        if kind not in _FITTINGS:
            raise ValueError(f"kind {kind!r} is not known; known fittings are {FITTING_KEYS}")
        return _FITTINGS[kind](diameter_m)

    @property
    def has_check_valve(self) -> bool:
        """True when the counts include a check (non-return) valve."""
        return any(self.counts.get(k, 0) > 0 for k in _CHECK_VALVES)

    def _dp_props(
        self, q: np.ndarray, rho: np.ndarray, mu: np.ndarray, position: np.ndarray | None
    ) -> np.ndarray:
        v = q / (math.pi * self.diameter_m**2 / 4.0)
        return np.asarray(self.k_total * 0.5 * rho * v * v)


# --------------------------------------------------------------------------- control valve

Characteristic = Literal["equal_percentage", "linear", "quick_opening"]
_CHARACTERISTICS = ("equal_percentage", "linear", "quick_opening")


@dataclass(frozen=True)
class ControlValve(_Loss):
    """A control valve in liquid service, IEC 60534-2-1 non-choked flow.

    Q [m^3/h] = Kv(u)·√(ΔP [bar] / (ρ/ρ_ref)), so ΔP = 10^5·(ρ/ρ_ref)·(Q/Kv(u))² [Pa].

    Inherent characteristics, u the position 0–1 (travel):
    linear Kv = Kvs·u; equal-percentage Kv = Kvs·R^(u−1) (R the rangeability);
    quick-opening Kv = Kvs·√u. At u = 0 every characteristic is shut (Kv = 0; the
    equal-percentage law would leave Kvs/R, but a valve on its seat passes nothing),
    and ΔP is then ``inf`` for any q > 0 (0 at q = 0); a branch treats that as no flow.
    Choking and the Reynolds-number factor are not modelled: cooling-water valves run
    far from flashing and at high Re.

    Parameters
    ----------
    kvs_m3h : float
        Flow coefficient at full travel [m^3/h at 1 bar].
    characteristic : str
        "equal_percentage", "linear" or "quick_opening" [-].
    rangeability : float
        R of the equal-percentage law, > 1 [-].
    position : float
        Fixed position (travel) 0–1 [-], used when `dp` gets no *position*.
    reference_density : float
        ρ_ref of the Kv definition [kg/m^3]; 1000 (water) by default.

    >>> v = ControlValve(100.0, "linear", position=0.5)
    >>> round(float(v.dp(100.0 / 3600.0, temperature_c=20.0)) / 1e5, 4)  # Kv 50
    3.9928
    """

    kvs_m3h: float
    characteristic: Characteristic = "equal_percentage"
    rangeability: float = 50.0
    position: float = 1.0
    reference_density: float = 1000.0
    _kv_fixed: float = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        _positive("kvs_m3h", self.kvs_m3h)
        _positive("reference_density", self.reference_density)
        if self.characteristic not in _CHARACTERISTICS:
            raise ValueError(
                f"characteristic must be one of {_CHARACTERISTICS}; got {self.characteristic!r}"
            )
        if not (math.isfinite(self.rangeability) and self.rangeability > 1):
            raise ValueError(f"rangeability must be > 1; got {self.rangeability!r}")
        if not (0.0 <= self.position <= 1.0):
            raise ValueError(f"position must be within 0–1; got {self.position!r}")
        object.__setattr__(self, "_kv_fixed", float(self._kv(np.asarray(self.position))))

    CV_PER_KV: ClassVar[float] = 1.156  # US gpm at 1 psi per m^3/h at 1 bar

    @classmethod
    def from_cv(
        cls,
        cv: float,
        characteristic: Characteristic = "equal_percentage",
        rangeability: float = 50.0,
        position: float = 1.0,
    ) -> ControlValve:
        """A valve from its rated Cv [US gpm at 1 psi]; Kv = Cv/1.156 (IEC 60534-1).

        >>> round(ControlValve.from_cv(115.6).kvs_m3h, 6)
        100.0
        """
        _positive("cv", cv)
        return cls(cv / cls.CV_PER_KV, characteristic, rangeability, position)

    def kv(self, position: npt.ArrayLike | None = None) -> np.ndarray:
        """Flow coefficient Kv [m^3/h] at *position* 0–1 (default: the fixed position)."""
        u = np.asarray(self.position if position is None else position, dtype=float)
        if np.any(~((u >= 0.0) & (u <= 1.0))):
            raise ValueError("position must be within 0–1 (valve travel) and not NaN")
        return self._kv(u)

    def _kv(self, u: np.ndarray) -> np.ndarray:
        if self.characteristic == "linear":
            frac = u
        elif self.characteristic == "quick_opening":
            frac = np.sqrt(u)
        else:
            frac = np.where(u > 0.0, self.rangeability ** (u - 1.0), 0.0)
        return np.asarray(self.kvs_m3h * frac)

    def _dp_props(
        self, q: np.ndarray, rho: np.ndarray, mu: np.ndarray, position: np.ndarray | None
    ) -> np.ndarray:
        if position is None:
            kv: np.ndarray | float = self._kv_fixed
        else:
            kv = self._kv(position)
        qh = q * M3H_PER_M3S
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = qh / kv
        if not np.all(qh > 0):
            ratio = np.where(qh > 0, ratio, 0.0)
        return np.asarray((PA_PER_BAR / self.reference_density) * rho * (ratio * ratio))

    def _checked_position(self, position: npt.ArrayLike | None) -> np.ndarray | None:
        """*position* [-] as an array, its range checked (None: the fixed position)."""
        pos = None if position is None else np.asarray(position, dtype=float)
        if pos is not None:
            self.kv(pos)  # validates the range
        return pos


# --------------------------------------------------------------------------- equipment


@dataclass(frozen=True)
class Equipment(_Loss):
    """Equipment with a rated pressure drop (heat exchanger, strainer, cooler jacket).

    ΔP = ΔP_rated·(ρ/ρ_rated)·(Q/Q_rated)^n; n = 2 for fully rough turbulent flow,
    about 1.75–1.9 for smooth tube bundles (common practice).

    Parameters
    ----------
    rated_dp_pa : float
        Pressure drop at the rated flow [Pa].
    rated_flow_m3s : float
        Rated flow [m^3/s].
    exponent : float
        n, within 1–3 [-] (the branch root finder relies on n >= 1).
    rated_density : float
        Density the rating refers to [kg/m^3] (water at 20 °C by default).

    >>> e = Equipment(50_000.0, 140.0 / 3600.0, exponent=2.0)
    >>> round(float(e.dp(70.0 / 3600.0, temperature_c=20.0)))
    12500
    """

    rated_dp_pa: float
    rated_flow_m3s: float
    exponent: float = 1.9
    rated_density: float = 998.2

    def __post_init__(self) -> None:
        _positive("rated_dp_pa", self.rated_dp_pa)
        _positive("rated_flow_m3s", self.rated_flow_m3s)
        _positive("rated_density", self.rated_density)
        if not (1.0 <= self.exponent <= 3.0):
            raise ValueError(f"exponent must be within 1–3; got {self.exponent!r}")

    def _dp_props(
        self, q: np.ndarray, rho: np.ndarray, mu: np.ndarray, position: np.ndarray | None
    ) -> np.ndarray:
        scale = self.rated_dp_pa / self.rated_density
        return np.asarray(scale * rho * (q / self.rated_flow_m3s) ** self.exponent)


# --------------------------------------------------------------------------- elevation


@dataclass(frozen=True)
class Elevation(_Loss):
    """A rise (or, negative, a fall) along the branch's route [m].

    Static, not dynamic: its `dp` is zero; the branch adds ρ·g·rise_m to its static
    back-pressure (`model.branch.Branch.static_pressure`).

    >>> float(Elevation(6.0).dp(0.1))
    0.0
    """

    rise_m: float

    def __post_init__(self) -> None:
        if not math.isfinite(self.rise_m):
            raise ValueError(f"rise_m must be finite; got {self.rise_m!r}")

    def _dp_props(
        self, q: np.ndarray, rho: np.ndarray, mu: np.ndarray, position: np.ndarray | None
    ) -> np.ndarray:
        return np.zeros(np.broadcast(q, rho).shape)
