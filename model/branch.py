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
  the fixed pressure (or solved by `model.network.solve_nodal`).

Tank, held header and return header add no loss of their own: count an ``exit`` in the
fittings where the pipe discharges into a vessel.

`Branch.flow` inverts the curve for whole arrays of header pressures at once by
bracketed root finding: safeguarded Newton steps on ln Q, where the curve is almost a
straight line of slope 1–2, inside a bracket that every evaluation narrows (see
`_solve_block`). `stacked_flows` does the same for many branches together (the system
curve of a large header). A branch carries no flow at or below its threshold P_static
(nor below 1 nPa above it), and never negative flow; `Branch.backflow_hazard` flags
where the header falls below the static back-pressure of a branch without a check valve.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from model import water
from model.elements import (
    M3H_PER_M3S,
    PA_PER_BAR,
    RE_LAMINAR,
    RE_TURBULENT,
    ControlValve,
    Element,
    Elevation,
    Equipment,
    Fittings,
    Pipe,
    friction_factor_slope,
)

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

_Y_MIN_PA = 1e-9
_X_TOL = 1e-12  # on ln Q: a relative flow error below 1e-12
_STEP_TOL = 1e-7  # a Newton step below this leaves an error of order step² ~ 1e-15
_MAX_ITER = 100  # bisection after 12 steps halves the bracket each time: ample


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


@dataclass(frozen=True)
class HeldHeader:
    """A header held at *set_pressure_pa* [Pa gauge] by others, at *elevation_m* [m].

    A logged ``end_pressure_pa`` condition overrides the set point.
    """

    set_pressure_pa: float | None = None
    elevation_m: float = 0.0

    def __post_init__(self) -> None:
        _finite("set_pressure_pa", self.set_pressure_pa, allow_none=True)
        _finite("elevation_m", self.elevation_m)

    def end(
        self, rho: np.ndarray, level_m: np.ndarray | None, end_pressure_pa: np.ndarray | None
    ) -> tuple[np.ndarray, float]:
        """(P_e [Pa gauge], elevation of the end [m])."""
        p = end_pressure_pa if end_pressure_pa is not None else self.set_pressure_pa
        if p is None:
            raise ValueError(
                "end_pressure_pa: the held header has no set point, give end_pressure_pa"
            )
        return np.zeros_like(rho) + p, self.elevation_m


@dataclass(frozen=True)
class ReturnHeader:
    """A common return header at *pressure_pa* [Pa gauge], at *elevation_m* [m].

    A logged (or solved) ``end_pressure_pa`` condition overrides *pressure_pa*.
    """

    pressure_pa: float | None = None
    elevation_m: float = 0.0

    def __post_init__(self) -> None:
        _finite("pressure_pa", self.pressure_pa, allow_none=True)
        _finite("elevation_m", self.elevation_m)

    def end(
        self, rho: np.ndarray, level_m: np.ndarray | None, end_pressure_pa: np.ndarray | None
    ) -> tuple[np.ndarray, float]:
        """(P_e [Pa gauge], elevation of the end [m])."""
        p = end_pressure_pa if end_pressure_pa is not None else self.pressure_pa
        if p is None:
            raise ValueError(
                "end_pressure_pa: the return header has no fixed pressure, give end_pressure_pa"
            )
        return np.zeros_like(rho) + p, self.elevation_m


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
                    f"branch {self.name!r}: the open discharge already adds the exit loss; "
                    "remove 'exit' from the fittings or set exit_loss_k=0"
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
        p_s = _pressures(header_pressure_pa)
        static, curve = self._curve(
            temperature_c=temperature_c,
            level_m=level_m,
            end_pressure_pa=end_pressure_pa,
            valve_position=valve_position,
            resistance_ratio=resistance_ratio,
        )
        return _solve_curve(curve, p_s - static, self.name)

    def _curve(
        self,
        *,
        temperature_c: npt.ArrayLike = 20.0,
        level_m: npt.ArrayLike | None = None,
        end_pressure_pa: npt.ArrayLike | None = None,
        valve_position: npt.ArrayLike | None = None,
        resistance_ratio: npt.ArrayLike = 1.0,
    ) -> tuple[np.ndarray, _Curve]:
        """(P_static [Pa gauge], the dynamic curve as coefficients) at these conditions."""
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
        curve = _Curve(rho, quad, pipes, equipment, self._q_ref)  # type: ignore[arg-type]
        return static, curve


@dataclass(frozen=True)
class _Curve:
    """Dynamic ΔP(Q) of one branch, or a stack of branches along axis 0, as coefficients.

    ΔP = ρ·(quad·Q² + Σ kp·f(Q·gp, ep)·Q² + Σ a·Q^n), f from `friction_factor`.
    Every array broadcasts against the flows.
    """

    rho: np.ndarray
    quad: np.ndarray
    pipes: tuple[tuple[np.ndarray, np.ndarray, np.ndarray], ...]
    equipment: tuple[tuple[np.ndarray, np.ndarray], ...]
    q_ref: np.ndarray

    def dp_slope(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(ΔP [Pa], d ln ΔP / d ln Q [-], near a kink) at ln Q = *x*.

        *near a kink*: some pipe's Re is within 10 % of 2000 or 4000, where the slope
        jumps (laminar – transition – turbulent).
        """
        q = np.exp(x)
        q2 = q * q
        total = self.quad * q2
        d_total = 2.0 * total
        kink: np.ndarray | bool = False
        for k, g, e in self.pipes:
            re = q * g
            f, sf = friction_factor_slope(re, e)
            kink = kink | ((re > 0.9 * RE_LAMINAR) & (re < 1.1 * RE_TURBULENT))
            term = k * f * q2
            total = total + term
            d_total = d_total + term * (2.0 + sf)
        for a, n in self.equipment:
            term = a * np.exp(n * x)
            total = total + term
            d_total = d_total + n * term
        with np.errstate(divide="ignore", invalid="ignore"):
            slope = d_total / total
        return np.asarray(self.rho * total), np.asarray(slope), np.asarray(kink)


_CHUNK = 1 << 15  # elements per block: the temporaries stay in cache (256 kB each)


def _map_curve(curve: _Curve, fn: Callable[[np.ndarray], np.ndarray]) -> _Curve:
    return _Curve(
        fn(curve.rho),
        fn(curve.quad),
        tuple((fn(k), fn(g), fn(e)) for k, g, e in curve.pipes),
        tuple((fn(a), fn(n)) for a, n in curve.equipment),
        fn(curve.q_ref),
    )


def _arrays(curve: _Curve) -> list[np.ndarray]:
    out = [curve.rho, curve.quad, curve.q_ref]
    for k, g, e in curve.pipes:
        out += [k, g, e]
    for a, n in curve.equipment:
        out += [a, n]
    return [np.asarray(a) for a in out]


def _solve_curve(curve: _Curve, y: np.ndarray, name: str) -> np.ndarray:
    """`_solve_block` over blocks of at most `_CHUNK` elements.

    On a million elements every numpy temporary is a fresh 8 MB allocation that misses
    the cache; blocks of 32 k elements run several times faster and let blocks that
    converge early stop early.
    """
    full = np.broadcast_shapes(np.shape(y), *(a.shape for a in _arrays(curve)))
    size = math.prod(full)
    if size <= _CHUNK:
        return _solve_block(curve, y, name)
    nd = len(full)

    def pad(a: np.ndarray) -> np.ndarray:
        a = np.asarray(a)
        return a.reshape((1,) * (nd - a.ndim) + a.shape)

    out = np.empty(full)
    inner = math.prod(full[1:])
    if nd >= 2 and full[0] > 1 and inner <= _CHUNK:
        rows = max(1, _CHUNK // inner)
        for i in range(0, full[0], rows):

            def take(a: np.ndarray, i: int = i) -> np.ndarray:
                a = pad(a)
                return a if a.shape[0] == 1 else a[i : i + rows]

            out[i : i + rows] = _solve_block(_map_curve(curve, take), take(y), name)
        return out
    def spread(a: np.ndarray) -> np.ndarray:  # once, not per block
        a = np.asarray(a)
        return a.reshape(()) if a.size == 1 else np.broadcast_to(a, full).reshape(-1)

    flat_curve = _map_curve(curve, spread)
    flat_y = spread(y)
    flat = out.reshape(-1)
    for i in range(0, size, _CHUNK):

        def cut(a: np.ndarray, i: int = i) -> np.ndarray:
            return a if a.ndim == 0 else a[i : i + _CHUNK]

        flat[i : i + _CHUNK] = _solve_block(_map_curve(flat_curve, cut), cut(flat_y), name)
    return out


@dataclass(frozen=True)
class _Keep:
    """Select the elements still being solved (scalars pass through)."""

    mask: np.ndarray

    def __call__(self, a: np.ndarray) -> np.ndarray:
        return a if a.ndim == 0 else a[self.mask]


def _solve_block(curve: _Curve, y: np.ndarray, name: str) -> np.ndarray:
    """Q >= 0 with ΔP_dyn(Q) = y where y > 0 (zero elsewhere, and where a valve is shut).

    Safeguarded Newton on x = ln Q with residual g = ln ΔP(x) − ln y and the analytic
    slope s = d ln ΔP/d ln Q. ln ΔP rises with slope >= 1 everywhere (every element's
    drop grows at least in proportion to Q: laminar friction exactly so, equipment
    exponents >= 1), so each evaluated point also bounds the root from both sides:
    it lies between x and x − g. The bracket is the intersection of those bounds; a
    Newton step that leaves it, or any step after many, is replaced by bisection, so the
    iteration converges on any monotone curve, kinks (laminar–turbulent) included.
    Elements drop out of the arrays as they converge.
    """
    shape = np.broadcast_shapes(np.shape(y), *(a.shape for a in _arrays(curve)))
    # First guess: one Newton step from the reference flow, evaluated on the
    # coefficients' own shape (one number per branch when the conditions are scalars),
    # before they are spread over every header pressure.
    x_ref = np.log(curve.q_ref)
    d_ref, s_ref, _ = curve.dp_slope(np.asarray(x_ref))
    ln_d_ref = np.log(np.maximum(d_ref, 1e-300))
    s_ref = np.clip(s_ref, 1.0, None)

    def flat(a: np.ndarray) -> np.ndarray:
        a = np.asarray(a)
        return a.reshape(()) if a.size == 1 else np.broadcast_to(a, shape).reshape(-1)

    curve = _map_curve(curve, flat)
    yv = np.broadcast_to(y, shape).reshape(-1)
    shut = ~np.isfinite(np.broadcast_to(curve.quad, yv.shape))  # a valve on its seat
    # Below 1 nPa of driving pressure (far under any gauge's resolution) the flow is
    # taken as zero: there Q² would underflow and ΔP(Q) could not be evaluated.
    idx = np.flatnonzero((yv > _Y_MIN_PA) & ~shut)
    q_out = np.zeros(yv.shape)
    if idx.size == 0:
        return q_out.reshape(shape)
    c = _map_curve(curve, _Keep(idx))
    ln_y = np.log(yv[idx])
    pick = _Keep(idx)
    x = pick(flat(x_ref)) + (ln_y - pick(flat(ln_d_ref))) / pick(flat(s_ref))
    x = np.array(np.broadcast_to(x, ln_y.shape))
    lo = np.full(ln_y.shape, -np.inf)
    hi = np.full(ln_y.shape, np.inf)
    todo = np.arange(idx.size)
    x_out = np.empty(idx.size)
    for it in range(_MAX_ITER):
        d, s, kink = c.dp_slope(x)
        # the floor keeps ln finite where exp(x) underflows; the sign stays right
        g = np.log(np.maximum(d, 1e-300)) - ln_y
        lo, hi = _narrow(lo, hi, x, g)
        step = g / np.maximum(s, 1.0)
        x_new = x - step
        inside = (x_new > lo) & (x_new < hi)
        if it >= 12:
            inside[:] = False
        x_new = np.where(inside, x_new, 0.5 * (lo + hi))
        # Newton's next error is about (step)²: a step this small is final unevaluated
        tol = np.where(kink, _X_TOL, _STEP_TOL)  # at a kink the error is ~step, not step²
        exact = g == 0.0
        fin = (inside & (np.abs(step) <= tol)) | exact | (hi - lo <= _X_TOL)
        x_new = np.where(exact, x, x_new)
        if np.any(fin):
            x_out[todo[fin]] = x_new[fin]
            keep = ~fin
            todo = todo[keep]
            if todo.size == 0:
                break
            x_new, ln_y, lo, hi = x_new[keep], ln_y[keep], lo[keep], hi[keep]
            c = _map_curve(c, _Keep(keep))
        x = x_new
    else:
        log.warning(
            "branch %s: flow inversion stopped after %d iterations for %d points",
            name,
            _MAX_ITER,
            todo.size,
        )
        x_out[todo] = x
    q_out[idx] = np.exp(x_out)
    return q_out.reshape(shape)


def stacked_flows(
    branches: Sequence[Branch],
    header_pressure_pa: npt.ArrayLike,
    conditions: Sequence[Mapping[str, Any]],
) -> list[np.ndarray]:
    """Flows [m^3/s] of many branches at the same header pressures [Pa gauge], at once.

    The same answer as ``[b.flow(p, **c) for b, c in zip(branches, conditions)]``, but
    the branches' curves are stacked along a new first axis and solved together, so
    numpy works on one large array instead of many small ones (a system curve of a
    thousand branches at a thousand pressures costs about as much as one branch at a
    million).
    """
    if len(branches) != len(conditions):
        raise ValueError("conditions must hold one mapping per branch")
    p_s = _pressures(header_pressure_pa)
    pairs = zip(branches, conditions, strict=True)
    prepared = [b._curve(**c) for b, c in pairs]
    if not prepared:
        return []
    shape = np.broadcast_shapes(
        p_s.shape, *(np.broadcast(s, c.quad).shape for s, c in prepared)
    )
    n = len(prepared)
    lead = (n,) + (1,) * len(shape)

    def stack(arrays: Sequence[np.ndarray]) -> np.ndarray:
        if all(a.size == 1 for a in arrays):
            return np.array([float(a.reshape(())) for a in arrays]).reshape(lead)
        return np.stack([np.broadcast_to(a, shape) for a in arrays])

    curves = [c for _, c in prepared]
    n_pipes = max(len(c.pipes) for c in curves)
    n_equip = max(len(c.equipment) for c in curves)
    # padding: a pipe of zero length (Re kept turbulent so f stays finite), and
    # equipment with a zero rated drop
    pad_pipe = (np.asarray(0.0), np.asarray(1e12), np.asarray(0.0))
    pad_equip = (np.asarray(0.0), np.asarray(1.0))
    pipes = tuple(
        tuple(
            stack([np.asarray((c.pipes[k] if k < len(c.pipes) else pad_pipe)[j]) for c in curves])
            for j in range(3)
        )
        for k in range(n_pipes)
    )
    equipment = tuple(
        tuple(
            stack(
                [
                    np.asarray((c.equipment[k] if k < len(c.equipment) else pad_equip)[j])
                    for c in curves
                ]
            )
            for j in range(2)
        )
        for k in range(n_equip)
    )
    stacked = _Curve(
        stack([np.asarray(c.rho) for c in curves]),
        stack([np.asarray(c.quad) for c in curves]),
        pipes,  # type: ignore[arg-type]
        equipment,  # type: ignore[arg-type]
        stack([np.asarray(c.q_ref) for c in curves]),
    )
    static = stack([np.asarray(s) for s, _ in prepared])
    q = _solve_curve(stacked, p_s - static, "stack")
    return [q[i] for i in range(n)]


def _pressures(header_pressure_pa: npt.ArrayLike) -> np.ndarray:
    p_s = np.asarray(header_pressure_pa, dtype=float)
    if np.any(np.isnan(p_s)):
        raise ValueError("header_pressure_pa must not be NaN")
    return p_s


def _narrow(
    lo: np.ndarray, hi: np.ndarray, x: np.ndarray, f: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Shrink the bracket [lo, hi] with the point (x, f): root in [x − f, x] or [x, x − f]."""
    below = f < 0
    across = x - f
    return (
        np.maximum(lo, np.where(below, x, across)),
        np.minimum(hi, np.where(below, across, x)),
    )


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
