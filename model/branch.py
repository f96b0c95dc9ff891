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
bracketed root finding (Anderson–Björck false position in log Q – log ΔP, where the
curve is almost a straight line of slope 1–2). A branch carries no flow at or below its
threshold P_static, and never negative flow; `Branch.backflow_hazard` flags where the
header falls below the static back-pressure of a branch without a check valve.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from model import water
from model.elements import (
    ControlValve,
    Element,
    Elevation,
    Equipment,
    Fittings,
    Pipe,
)

__all__ = [
    "Branch",
    "HeldHeader",
    "OpenDischarge",
    "ReturnHeader",
    "Tank",
    "Termination",
]

log = logging.getLogger(__name__)

_LN_TOL = 1e-13  # stop when |ln ΔP(Q) − ln ΔP_target| is below this (relative 1e-13)
_MAX_ITER = 100  # the bracket halves at worst every other step: far beyond need


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
    check_valve: bool | None = None
    _pipes: tuple[Pipe, ...] = field(init=False, repr=False, compare=False)
    _equipment: tuple[Equipment, ...] = field(init=False, repr=False, compare=False)
    _valves: tuple[ControlValve, ...] = field(init=False, repr=False, compare=False)
    _k_over_a2: float = field(init=False, repr=False, compare=False)
    _rise_m: float = field(init=False, repr=False, compare=False)
    _q_ref: float = field(init=False, repr=False, compare=False)

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

        Zero at or below the threshold, and where a control valve is shut.
        """
        p_s = np.asarray(header_pressure_pa, dtype=float)
        if np.any(np.isnan(p_s)):
            raise ValueError("header_pressure_pa must not be NaN")
        r = _ratio(resistance_ratio)
        t = np.asarray(temperature_c, dtype=float)
        rho = water.density(t)
        mu = water.viscosity(t)
        pos = self._position(valve_position)
        static = self._static(rho, _opt(level_m), _opt(end_pressure_pa))
        # ΔP at the reference flow, on the conditions' own shape (often scalars): it
        # gives the root finder its first guess without an evaluation per pressure.
        rest_ref, valve_ref = self._parts(np.asarray(self._q_ref), rho, mu, pos)
        dp_ref = r * rest_ref + valve_ref
        arrays = [p_s - static, r, rho, mu, dp_ref] + ([] if pos is None else [pos])
        b = np.broadcast_arrays(*arrays)
        y, r_b, rho_b, mu_b, dp_ref_b = b[0], b[1], b[2], b[3], b[4]
        pos_b = None if pos is None else b[5]
        open_ = (y > 1e-290) & (dp_ref_b < np.inf)  # a shut valve passes nothing
        q = np.zeros(y.shape)
        if not np.any(open_):
            return q
        if np.all(open_):
            q = self._solve(y, r_b, rho_b, mu_b, pos_b, dp_ref_b)
        else:
            sub = None if pos_b is None else pos_b[open_]
            q[open_] = self._solve(
                y[open_], r_b[open_], rho_b[open_], mu_b[open_], sub, dp_ref_b[open_]
            )
        return q

    def _solve(
        self,
        y: np.ndarray,
        r: np.ndarray,
        rho: np.ndarray,
        mu: np.ndarray,
        pos: np.ndarray | None,
        dp_ref: np.ndarray,
    ) -> np.ndarray:
        """Q with r·rest(Q) + valve(Q) = y > 0, on ln Q, bracketed.

        ln ΔP(ln Q) has slope >= 1 everywhere (every element's drop grows at least in
        proportion to Q: laminar friction exactly so, equipment exponent >= 1), so from
        any x0 with residual g0 = ln ΔP(x0) − ln y the point x0 − g0 lies on the other
        side of the root: two evaluations give a guaranteed bracket.
        """
        ln_y = np.log(y)

        def resid(x: np.ndarray) -> np.ndarray:
            rest, valve = self._parts(np.exp(x), rho, mu, pos)
            # the floor keeps ln finite where exp(x) underflows; the sign stays right
            return np.asarray(np.log(np.maximum(r * rest + valve, 1e-300)) - ln_y)

        # first guess as if ΔP ∝ Q² (close for turbulent branches)
        x0 = math.log(self._q_ref) + 0.5 * (ln_y - np.log(dp_ref))
        f0 = resid(x0)
        x1 = x0 - f0
        f1 = resid(x1)
        swap = np.abs(f0) < np.abs(f1)
        x0, x1 = np.where(swap, x1, x0), np.where(swap, x0, x1)
        f0, f1 = np.where(swap, f1, f0), np.where(swap, f0, f1)
        done = np.abs(f1) <= _LN_TOL
        for _ in range(_MAX_ITER):
            if np.all(done):
                break
            denom = f1 - f0
            with np.errstate(divide="ignore", invalid="ignore"):
                x2 = np.where(done | (denom == 0), x1, x1 - f1 * (x1 - x0) / denom)
            f2 = resid(x2)
            crossed = f2 * f1 < 0
            # Anderson–Björck: shrink the stale end's residual so the bracket closes
            # from both sides instead of creeping from one (plain false position).
            m = np.where(f1 != 0, 1.0 - f2 / np.where(f1 != 0, f1, 1.0), 0.5)
            m = np.where(m > 0, m, 0.5)
            x0 = np.where(crossed, x1, x0)
            f0 = np.where(crossed, f1, np.where(done, f0, f0 * m))
            x1, f1 = np.where(done, x1, x2), np.where(done, f1, f2)
            done = done | (np.abs(f1) <= _LN_TOL) | (np.abs(x1 - x0) <= 1e-14 * np.abs(x1))
        else:
            log.warning(
                "branch %s: flow inversion stopped after %d iterations, worst residual %.2e",
                self.name,
                _MAX_ITER,
                float(np.max(np.abs(f1))),
            )
        return np.asarray(np.exp(x1))


def _ratio(resistance_ratio: npt.ArrayLike) -> np.ndarray:
    r = np.asarray(resistance_ratio, dtype=float)
    if np.any(~((r > 0) & np.isfinite(r))):
        raise ValueError("resistance_ratio must be finite and > 0")
    return r
