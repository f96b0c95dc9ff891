"""One branch of a supply header: its curve ΔP(Q) and the inverse Q(P_s).

A branch leaves the supply header (pressure P_s, gauge, reference elevation 0), runs
through a series of elements (`model.elements`) and ends at a termination::

    P_s = P_static + r·ΔP_rest(Q) + ΔP_valve(Q)              for Q > 0
    P_static = P_e + ρ(T)·g·Δz

Δz is the termination's elevation plus the rises of any `Elevation` elements. ΔP_valve
is the control valve's own drop when its position is given (a logged tag), and r (the
resistance ratio: 1 clean, as designed) multiplies everything else. When no position is
given the valves sit at their fixed positions and count in ΔP_rest.

Terminations (P_e):

* `OpenDischarge` — P_e = 0 gauge, free outfall; the exit loss (K = 1 by default) on the
  velocity of the last pipe is added to ΔP_rest. Do not also count an ``exit`` fitting
  (the branch refuses the double count).
* `Tank` — P_e = gas pressure + ρ·g·level, at the tank's base elevation; the level is the
  ``level_m`` condition when given (a logged tag), else the fixed level.
* `HeldHeader` — a header held at a pressure by others: the ``end_pressure_pa``
  condition when logged, else the set point.
* `ReturnHeader` — a common return: the ``end_pressure_pa`` condition when logged, else
  the fixed pressure (or solved by `model.nodal.solve_nodal`).

Tank, held header and return header add no loss of their own: count an ``exit`` in the
fittings where the pipe discharges into a vessel.

`Branch.flow` inverts the curve for whole arrays of header pressures at once by
bracketed root finding: safeguarded Newton steps on ln Q, where the curve is almost a
straight line of slope 1–2, inside a bracket that every evaluation narrows (the solver
lives in `model.inverse`). `stacked_flows` (from `model.inverse`, re-exported here) does
the same for many branches together (the system curve of a large header). A branch
carries no flow at or below its threshold P_static (nor below 1 nPa above it), and never
negative flow; `Branch.backflow_hazard` flags where the header falls below the static
back-pressure of a branch without a check valve.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
import numpy.typing as npt

from model import water
from model.elements import (
    M3H_PER_M3S,
    PA_PER_BAR,
    ControlValve,
    Element,
    Elevation,
    Equipment,
    Fittings,
    Pipe,
)
from model.inverse import DynamicCurve, header_pressures, solve_curve, stacked_flows

__all__ = [
    "Branch",
    "HeldHeader",
    "OpenDischarge",
    "ReturnHeader",
    "Tank",
    "Termination",
    "stacked_flows",
]

log = logging.getLogger(__name__)


def _finite(name: str, value: float | None, *, allow_none: bool = False) -> None:
    if value is None and allow_none:
        return
    if value is None or not math.isfinite(value):
        raise ValueError(f"{name} must be a finite number; got {value!r}")


# --------------------------------------------------------------------------- terminations


@dataclass(frozen=True)
class OpenDischarge:
    """Free outfall to atmosphere at *elevation_m* [m] above the header reference.

    *exit_loss_k* [-] is the loss of the discharge's velocity head (1 for a free jet).
    """

    elevation_m: float = 0.0
    exit_loss_k: float = 1.0

    def __post_init__(self) -> None:
        _finite("elevation_m", self.elevation_m)
        if not (math.isfinite(self.exit_loss_k) and self.exit_loss_k >= 0):
            raise ValueError(f"exit_loss_k must be >= 0; got {self.exit_loss_k!r}")

    def end(
        self, rho: np.ndarray, level_m: np.ndarray | None, end_pressure_pa: np.ndarray | None
    ) -> tuple[np.ndarray, float]:
        """(P_e [Pa gauge], elevation of the end [m])."""
        return np.zeros_like(rho), self.elevation_m


@dataclass(frozen=True)
class Tank:
    """A tank whose bottom is *base_elevation_m* [m] above the header reference.

    P_e = gas_pressure_pa + ρ·g·level. *level_m* [m] is the fixed level, used when no
    ``level_m`` condition is given; *gas_pressure_pa* [Pa gauge] the blanket pressure
    (0 for a vented tank).
    """

    base_elevation_m: float
    level_m: float | None = None
    gas_pressure_pa: float = 0.0

    def __post_init__(self) -> None:
        _finite("base_elevation_m", self.base_elevation_m)
        _finite("level_m", self.level_m, allow_none=True)
        _finite("gas_pressure_pa", self.gas_pressure_pa)

    def end(
        self, rho: np.ndarray, level_m: np.ndarray | None, end_pressure_pa: np.ndarray | None
    ) -> tuple[np.ndarray, float]:
        """(P_e [Pa gauge], elevation of the end [m])."""
        level = level_m if level_m is not None else self.level_m
        if level is None:
            raise ValueError("level_m: the tank has no fixed level, give the level_m condition")
        return self.gas_pressure_pa + rho * water.G * level, self.base_elevation_m


class _HeaderEnd:
    """A termination at a header pressure: fixed in the site file, or the logged (or
    solved) ``end_pressure_pa`` condition, which overrides it. Subclasses name the
    field of the fixed pressure and what to say when there is none."""

    _PRESSURE_FIELD: ClassVar[str]
    _NO_PRESSURE: ClassVar[str]
    elevation_m: float

    def __post_init__(self) -> None:
        _finite(self._PRESSURE_FIELD, self._fixed_pressure(), allow_none=True)
        _finite("elevation_m", self.elevation_m)

    def _fixed_pressure(self) -> float | None:
        value: float | None = getattr(self, self._PRESSURE_FIELD)
        return value

    def end(
        self, rho: np.ndarray, level_m: np.ndarray | None, end_pressure_pa: np.ndarray | None
    ) -> tuple[np.ndarray, float]:
        """(P_e [Pa gauge], elevation of the end [m])."""
        p = end_pressure_pa if end_pressure_pa is not None else self._fixed_pressure()
        if p is None:
            raise ValueError(f"end_pressure_pa: {self._NO_PRESSURE}, give end_pressure_pa")
        return np.zeros_like(rho) + p, self.elevation_m


@dataclass(frozen=True)
class HeldHeader(_HeaderEnd):
    """A header held at *set_pressure_pa* [Pa gauge] by others, at *elevation_m* [m].

    A logged ``end_pressure_pa`` condition overrides the set point.
    """

    _PRESSURE_FIELD: ClassVar[str] = "set_pressure_pa"
    _NO_PRESSURE: ClassVar[str] = "the held header has no set point"
    set_pressure_pa: float | None = None
    elevation_m: float = 0.0


@dataclass(frozen=True)
class ReturnHeader(_HeaderEnd):
    """A common return header at *pressure_pa* [Pa gauge], at *elevation_m* [m].

    A logged (or solved) ``end_pressure_pa`` condition overrides *pressure_pa*.
    """

    _PRESSURE_FIELD: ClassVar[str] = "pressure_pa"
    _NO_PRESSURE: ClassVar[str] = "the return header has no fixed pressure"
    pressure_pa: float | None = None
    elevation_m: float = 0.0


Termination = OpenDischarge | Tank | HeldHeader | ReturnHeader


def _opt(a: npt.ArrayLike | None) -> np.ndarray | None:
    return None if a is None else np.asarray(a, dtype=float)


# --------------------------------------------------------------------------- branch


@dataclass(frozen=True)
class Branch:
    """A branch: elements in series from the supply header to a termination.

    Parameters
    ----------
    name : str
        Name of the branch (as in the site config) [-].
    elements : Sequence[Element]
        `Pipe`, `Fittings`, `ControlValve`, `Equipment`, `Elevation` in flow order.
    termination : Termination
        How the branch ends.
    check_valve : bool or None
        Whether a check valve stops reverse flow; None: True when any `Fittings`
        element counts a check valve.

    Conditions (keyword arrays that broadcast against each other and against the flow
    or header pressure): ``temperature_c`` [°C], ``level_m`` [m] (tank level),
    ``end_pressure_pa`` [Pa gauge] (logged termination pressure), ``valve_position``
    [-] (0–1, control valve travel), ``resistance_ratio`` [-] (r > 0).

    >>> b = Branch("CW-1", [Pipe(50.0, 0.1023, 4.5e-5), Fittings(0.1023, {"elbow_90": 4})],
    ...            Tank(6.0, level_m=0.0))
    >>> round(float(b.threshold_pressure()))  # 6 m of water at 20 °C
    58734
    >>> q = b.flow([50_000.0, 150_000.0])
    >>> q[0], round(float(q[1]) * 3600, 1)
    (np.float64(0.0), 123.7)
    """

    name: str
    elements: Sequence[Element]
    termination: Termination
    check_valve: bool | None = field(default=None, kw_only=True)
    _pipes: tuple[Pipe, ...] = field(init=False, repr=False, compare=False)
    _equipment: tuple[Equipment, ...] = field(init=False, repr=False, compare=False)
    _valves: tuple[ControlValve, ...] = field(init=False, repr=False, compare=False)
    _k_over_a2: float = field(init=False, repr=False, compare=False)
    _rise_m: float = field(init=False, repr=False, compare=False)
    _q_ref: float = field(init=False, repr=False, compare=False)
    _quad_fixed: float = field(init=False, repr=False, compare=False)
    _pipe_coefficients: tuple[tuple[float, float, float], ...] = field(
        init=False, repr=False, compare=False
    )
    _equipment_coefficients: tuple[tuple[float, float], ...] = field(
        init=False, repr=False, compare=False
    )

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise ValueError(f"name must be a non-empty string; got {self.name!r}")
        elements = tuple(self.elements)
        object.__setattr__(self, "elements", elements)
        known = (Pipe, Fittings, ControlValve, Equipment, Elevation)
        for i, e in enumerate(elements):
            if not isinstance(e, known):
                raise ValueError(
                    f"elements[{i}] of branch {self.name!r} is a {type(e).__name__}; "
                    "use Pipe, Fittings, ControlValve, Equipment or Elevation"
                )
        if not isinstance(self.termination, OpenDischarge | Tank | HeldHeader | ReturnHeader):
            raise ValueError(f"termination of branch {self.name!r} is not a termination")
        pipes = tuple(e for e in elements if isinstance(e, Pipe))
        fittings = [e for e in elements if isinstance(e, Fittings)]
        # K·ρv²/2 = (K/A²)·ρQ²/2: all fixed loss coefficients fold into one number.
        k_over_a2 = sum(f.k_total / (math.pi * f.diameter_m**2 / 4.0) ** 2 for f in fittings)
        term = self.termination
        if isinstance(term, OpenDischarge) and term.exit_loss_k > 0:
            if any(f.counts.get("exit", 0) for f in fittings):
                raise ValueError(
                    f"branch {self.name!r}: the open discharge already adds the exit loss "
                    f"(K = {term.exit_loss_k:g}); remove 'exit' from the fittings"
                )
            last_d = self._last_diameter(elements)
            if last_d is None:
                raise ValueError(
                    f"branch {self.name!r}: an open discharge needs a Pipe or Fittings "
                    "element to take the exit velocity from"
                )
            k_over_a2 += term.exit_loss_k / (math.pi * last_d**2 / 4.0) ** 2
        valves = tuple(e for e in elements if isinstance(e, ControlValve))
        equipment = tuple(e for e in elements if isinstance(e, Equipment))
        if not (pipes or valves or equipment or k_over_a2 > 0):
            raise ValueError(f"branch {self.name!r} has no element with a pressure loss")
        object.__setattr__(self, "_pipes", pipes)
        object.__setattr__(self, "_equipment", equipment)
        object.__setattr__(self, "_valves", valves)
        object.__setattr__(self, "_k_over_a2", float(k_over_a2))
        object.__setattr__(
            self, "_rise_m", float(sum(e.rise_m for e in elements if isinstance(e, Elevation)))
        )
        if self.check_valve is None:
            object.__setattr__(self, "check_valve", any(f.has_check_valve for f in fittings))
        object.__setattr__(self, "_q_ref", self._reference_flow())
        # the condition-free parts of the solver's coefficients (see `_curve`)
        quad_fixed = self._k_over_a2 * 0.5
        for v in valves:
            quad_fixed += (
                _valve_coefficient(v) / v._kv_fixed**2 if v._kv_fixed > 0 else math.inf
            )
        object.__setattr__(self, "_quad_fixed", quad_fixed)
        object.__setattr__(
            self,
            "_pipe_coefficients",
            tuple(
                (
                    0.5 * p.length_m / (p.inner_diameter_m * p.area_m2**2),
                    4.0 / (math.pi * p.inner_diameter_m),
                    p.roughness_m / p.inner_diameter_m,
                )
                for p in pipes
            ),
        )
        object.__setattr__(
            self,
            "_equipment_coefficients",
            tuple(
                (e.rated_dp_pa / e.rated_density / e.rated_flow_m3s**e.exponent, e.exponent)
                for e in equipment
            ),
        )

    @staticmethod
    def _last_diameter(elements: Sequence[Element]) -> float | None:
        for e in reversed(elements):
            if isinstance(e, Pipe):
                return e.inner_diameter_m
            if isinstance(e, Fittings):
                return e.diameter_m
        return None

    def _reference_flow(self) -> float:
        # A flow of the right order, where the root finder starts: 1.5 m/s in the main
        # pipe (common practice for cooling water), else the equipment's rating, else
        # the valve's flow at 1 bar.
        d = self.pipe_diameter_m
        if d is not None:
            return 1.5 * math.pi * d**2 / 4.0
        if self._equipment:
            return self._equipment[0].rated_flow_m3s
        if self._valves:
            return self._valves[0].kvs_m3h / 3600.0
        return 0.01

    # ------------------------------------------------------------------ geometry

    @property
    def main_pipe(self) -> Pipe | None:
        """The longest pipe of the branch (the one reports quote velocity for)."""
        return max(self._pipes, key=lambda p: p.length_m) if self._pipes else None

    @property
    def pipe_diameter_m(self) -> float | None:
        """Inner diameter of the main pipe [m] (None without pipes or fittings)."""
        main = self.main_pipe
        if main is not None:
            return main.inner_diameter_m
        return self._last_diameter(self.elements)

    def velocity(self, q: npt.ArrayLike) -> np.ndarray:
        """Mean velocity [m/s] in the main pipe at flow *q* [m^3/s]."""
        d = self.pipe_diameter_m
        if d is None:
            raise ValueError(f"branch {self.name!r} has no pipe to take a velocity in")
        return np.asarray(q, dtype=float) / (math.pi * d**2 / 4.0)

    @property
    def has_control_valve(self) -> bool:
        """True when the branch has a control valve."""
        return bool(self._valves)

    # ------------------------------------------------------------------ curves

    def _parts(
        self, q: np.ndarray, rho: np.ndarray, mu: np.ndarray, position: np.ndarray | None
    ) -> tuple[np.ndarray, np.ndarray]:
        rest = self._k_over_a2 * 0.5 * rho * q * q
        for p in self._pipes:
            rest = rest + p._dp_props(q, rho, mu, None)
        for e in self._equipment:
            rest = rest + e._dp_props(q, rho, mu, None)
        valve = np.zeros_like(rest)
        for v in self._valves:
            if position is None:
                rest = rest + v._dp_props(q, rho, mu, None)
            else:
                valve = valve + v._dp_props(q, rho, mu, position)
        return np.asarray(rest), np.asarray(valve)

    def dp_dynamic_parts(
        self,
        q: npt.ArrayLike,
        *,
        temperature_c: npt.ArrayLike = 20.0,
        valve_position: npt.ArrayLike | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Clean dynamic drop split as (rest, valve) [Pa] at flow *q* [m^3/s].

        *valve* is the control valves' drop at the given *valve_position* [-]; without a
        position it is zero and the valves (at their fixed positions) are in *rest*.
        """
        qa = np.asarray(q, dtype=float)
        if np.any(~(qa >= 0)):
            raise ValueError("q must be >= 0 m^3/s and not NaN")
        t = np.asarray(temperature_c, dtype=float)
        pos = self._position(valve_position)
        return self._parts(qa, water.density(t), water.viscosity(t), pos)

    def _position(self, valve_position: npt.ArrayLike | None) -> np.ndarray | None:
        pos = _opt(valve_position)
        if pos is not None and np.any(~((pos >= 0.0) & (pos <= 1.0))):
            raise ValueError("valve_position must be within 0–1 (valve travel) and not NaN")
        return pos

    def dp_dynamic(
        self,
        q: npt.ArrayLike,
        *,
        temperature_c: npt.ArrayLike = 20.0,
        valve_position: npt.ArrayLike | None = None,
    ) -> np.ndarray:
        """Clean (r = 1) dynamic pressure drop [Pa] at flow *q* [m^3/s]."""
        rest, valve = self.dp_dynamic_parts(
            q, temperature_c=temperature_c, valve_position=valve_position
        )
        return np.asarray(rest + valve)

    def static_pressure(
        self,
        *,
        temperature_c: npt.ArrayLike = 20.0,
        level_m: npt.ArrayLike | None = None,
        end_pressure_pa: npt.ArrayLike | None = None,
    ) -> np.ndarray:
        """Static back-pressure at the header, P_e + ρ·g·Δz [Pa gauge]."""
        rho = water.density(temperature_c)
        return self._static(rho, _opt(level_m), _opt(end_pressure_pa))

    def _static(
        self, rho: np.ndarray, level_m: np.ndarray | None, end_pressure_pa: np.ndarray | None
    ) -> np.ndarray:
        p_e, z_end = self.termination.end(rho, level_m, end_pressure_pa)
        return np.asarray(p_e + rho * water.G * (z_end + self._rise_m))

    threshold_pressure = static_pressure
    """Header pressure [Pa gauge] at and below which the branch carries no flow."""

    def dp(
        self,
        q: npt.ArrayLike,
        *,
        temperature_c: npt.ArrayLike = 20.0,
        level_m: npt.ArrayLike | None = None,
        end_pressure_pa: npt.ArrayLike | None = None,
        valve_position: npt.ArrayLike | None = None,
        resistance_ratio: npt.ArrayLike = 1.0,
    ) -> np.ndarray:
        """Header pressure [Pa gauge] the branch needs to pass flow *q* [m^3/s].

        = static + r·rest + valve (see the module docstring).
        """
        r = _ratio(resistance_ratio)
        rest, valve = self.dp_dynamic_parts(
            q, temperature_c=temperature_c, valve_position=valve_position
        )
        static = self.static_pressure(
            temperature_c=temperature_c, level_m=level_m, end_pressure_pa=end_pressure_pa
        )
        return np.asarray(static + r * rest + valve)

    def backflow_hazard(
        self,
        header_pressure_pa: npt.ArrayLike,
        *,
        temperature_c: npt.ArrayLike = 20.0,
        level_m: npt.ArrayLike | None = None,
        end_pressure_pa: npt.ArrayLike | None = None,
    ) -> np.ndarray:
        """True where the header is below the static back-pressure and no check valve.

        Then water can run back from the tank or header into the supply.
        """
        p_s = np.asarray(header_pressure_pa, dtype=float)
        static = self.static_pressure(
            temperature_c=temperature_c, level_m=level_m, end_pressure_pa=end_pressure_pa
        )
        return np.asarray((p_s < static) & (not self.check_valve))

    # ------------------------------------------------------------------ inverse

    def flow(
        self,
        header_pressure_pa: npt.ArrayLike,
        *,
        temperature_c: npt.ArrayLike = 20.0,
        level_m: npt.ArrayLike | None = None,
        end_pressure_pa: npt.ArrayLike | None = None,
        valve_position: npt.ArrayLike | None = None,
        resistance_ratio: npt.ArrayLike = 1.0,
    ) -> np.ndarray:
        """Flow [m^3/s] at header pressures *header_pressure_pa* [Pa gauge], vectorised.

        Zero at or below the threshold (and within 1 nPa above it, where Q² would
        underflow), and where a control valve is shut. Accurate to about 1e-12
        relative.
        """
        p_s = header_pressures(header_pressure_pa)
        static, curve = self.dynamic_curve(
            temperature_c=temperature_c,
            level_m=level_m,
            end_pressure_pa=end_pressure_pa,
            valve_position=valve_position,
            resistance_ratio=resistance_ratio,
        )
        return solve_curve(curve, p_s - static, self.name)

    def dynamic_curve(
        self,
        *,
        temperature_c: npt.ArrayLike = 20.0,
        level_m: npt.ArrayLike | None = None,
        end_pressure_pa: npt.ArrayLike | None = None,
        valve_position: npt.ArrayLike | None = None,
        resistance_ratio: npt.ArrayLike = 1.0,
    ) -> tuple[np.ndarray, DynamicCurve]:
        """(P_static [Pa gauge], the dynamic curve as coefficients) at these conditions:
        what `model.inverse.solve_curve` and `stacked_flows` solve for the flow."""
        # Scalar conditions (the usual case for a curve) stay Python floats: a stack of
        # a thousand branches is set up a thousand times, and numpy's 0-d arithmetic
        # costs a microsecond per operation.
        r = _scalar(_ratio(resistance_ratio))
        t = np.asarray(temperature_c, dtype=float)
        rho = _scalar(water.density(t))
        nu_inv = rho / _scalar(water.viscosity(t))
        pos = self._position(valve_position)
        static = self._static(np.asarray(rho), _opt(level_m), _opt(end_pressure_pa))
        # ΔP/ρ = quad·Q² + r·Σ pipes kp·f(Q·gp, ep)·Q² + r·Σ equipment a·Q^n; every
        # coefficient is fixed by the conditions, so it is computed once, not per step.
        if pos is None:
            quad: Any = r * self._quad_fixed
        else:
            quad = r * self._k_over_a2 * 0.5
            for v in self._valves:
                with np.errstate(divide="ignore"):
                    quad = quad + _valve_coefficient(v) / np.square(v._kv(pos))
        pipes = tuple((r * k, nu_inv * g, e) for k, g, e in self._pipe_coefficients)
        equipment = tuple((r * a, n) for a, n in self._equipment_coefficients)
        curve = DynamicCurve(rho, quad, pipes, equipment, self._q_ref)  # type: ignore[arg-type]
        return static, curve


def _ratio(resistance_ratio: npt.ArrayLike) -> np.ndarray:
    if isinstance(resistance_ratio, float | int):  # the common case, checked cheaply
        if not (math.isfinite(resistance_ratio) and resistance_ratio > 0):
            raise ValueError("resistance_ratio must be finite and > 0")
        return np.asarray(float(resistance_ratio))
    r = np.asarray(resistance_ratio, dtype=float)
    if np.any(~((r > 0) & np.isfinite(r))):
        raise ValueError("resistance_ratio must be finite and > 0")
    return r


def _scalar(a: np.ndarray) -> Any:
    """A 0-d array as a Python float (fast arithmetic), any other array unchanged."""
    return float(a) if a.ndim == 0 else a


def _valve_coefficient(v: ControlValve) -> float:
    # ΔP = ρ·c/Kv²·Q² with Q in m³/s: c = 10^5·3600²/ρ_ref (IEC 60534, Kv in m³/h)
    return PA_PER_BAR * M3H_PER_M3S**2 / v.reference_density
