"""Branches in parallel from one supply header, pump curves, and their operating point.

Parallel header (`ParallelHeader`): every branch leaves one supply header at pressure
P_s, so Q_total(P_s) = Σ Q_i(P_s) with each Q_i from `model.branch.Branch.flow`. The
system curve is that sum over an array of header pressures; it kinks at each branch's
threshold pressure, where a new branch starts to flow.

Pumps (`PumpCurve`): head against flow from datasheet points, interpolated by a
monotone piecewise cubic (PCHIP, Fritsch & Carlson 1980) so the curve never overshoots
between points; another speed by the affinity laws (Q ∝ N, H ∝ N²); identical pumps in
parallel share the flow equally.

The branch flows of a header come from `model.branch.stacked_flows`, which inverts all
branch curves together (a system curve of 1,000 branches at 1,000 pressures in about a
second on two cores; see ``benchmarks/curve.py``).

Operating point (`operating_point`): the header pressure where the pumps' pressure rise
at the total flow equals the header pressure; a bracketed root (Brent) of a function
that falls strictly with P_s. Requests without an answer (the pumps cannot reach any
branch's threshold) come back as a status, not an exception.

Networks with more than one unknown pressure (a return header) are `model.nodal`'s.

Pressures are gauge [Pa], flows [m^3/s]; pump heads [m] of the water pumped.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
from scipy.interpolate import PchipInterpolator
from scipy.optimize import brentq

from model import water
from model.branch import Branch, stacked_flows

__all__ = [
    "OperatingPoint",
    "ParallelHeader",
    "PumpCurve",
    "SystemCurve",
    "operating_point",
]

log = logging.getLogger(__name__)

Conditions = Mapping[str, Mapping[str, Any]]


# --------------------------------------------------------------------------- parallel header


@dataclass(frozen=True)
class SystemCurve:
    """Total and per-branch flow against header pressure.

    header_pressure_pa [Pa gauge], total_flow_m3s and each of branch_flows_m3s [m^3/s]
    are arrays of one shape; thresholds_pa [Pa gauge] per branch (at the first
    condition when conditions are arrays).
    """

    header_pressure_pa: np.ndarray
    total_flow_m3s: np.ndarray
    branch_flows_m3s: Mapping[str, np.ndarray]
    thresholds_pa: Mapping[str, float]


@dataclass(frozen=True)
class ParallelHeader:
    """Branches in parallel from one supply header.

    *conditions* in the methods map a branch name to that branch's condition keywords
    (``temperature_c``, ``level_m``, ``end_pressure_pa``, ``valve_position``,
    ``resistance_ratio``; see `model.branch.Branch`); a branch not named runs at the
    defaults. Arrays in the conditions broadcast against the header pressures.
    """

    branches: Sequence[Branch]

    def __post_init__(self) -> None:
        branches = tuple(self.branches)
        if not branches:
            raise ValueError("branches must hold at least one Branch")
        for i, b in enumerate(branches):
            if not isinstance(b, Branch):
                raise ValueError(f"branches[{i}] is a {type(b).__name__}, not a Branch")
        names = [b.name for b in branches]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ValueError(f"branches: names must be unique; repeated {dup}")
        object.__setattr__(self, "branches", branches)

    def _conditions(self, conditions: Conditions | None) -> dict[str, dict[str, Any]]:
        conditions = conditions or {}
        unknown = sorted(set(conditions) - {b.name for b in self.branches})
        if unknown:
            raise ValueError(f"conditions: no branch named {unknown}")
        return {b.name: dict(conditions.get(b.name, {})) for b in self.branches}

    def branch_flows(
        self, header_pressure_pa: npt.ArrayLike, conditions: Conditions | None = None
    ) -> dict[str, np.ndarray]:
        """Flow [m^3/s] of each branch at header pressures [Pa gauge]."""
        cond = self._conditions(conditions)
        p = np.asarray(header_pressure_pa, dtype=float)
        flows = stacked_flows(self.branches, p, [cond[b.name] for b in self.branches])
        return {b.name: q for b, q in zip(self.branches, flows, strict=True)}

    def total_flow(
        self, header_pressure_pa: npt.ArrayLike, conditions: Conditions | None = None
    ) -> np.ndarray:
        """Total flow [m^3/s] leaving the header at header pressures [Pa gauge]."""
        flows = self.branch_flows(header_pressure_pa, conditions)
        return np.asarray(sum(flows.values()))

    def thresholds(self, conditions: Conditions | None = None) -> dict[str, np.ndarray]:
        """Threshold (static) pressure [Pa gauge] of each branch."""
        cond = self._conditions(conditions)
        out = {}
        for b in self.branches:
            c = cond[b.name]
            out[b.name] = b.threshold_pressure(
                temperature_c=c.get("temperature_c", 20.0),
                level_m=c.get("level_m"),
                end_pressure_pa=c.get("end_pressure_pa"),
            )
        return out

    def system_curve(
        self, pressures: npt.ArrayLike, conditions: Conditions | None = None
    ) -> SystemCurve:
        """The system curve at header pressures *pressures* [Pa gauge]."""
        p = np.asarray(pressures, dtype=float)
        flows = self.branch_flows(p, conditions)
        total = np.asarray(sum(flows.values()))
        thr = {k: float(np.ravel(v)[0]) for k, v in self.thresholds(conditions).items()}
        return SystemCurve(p, total, flows, thr)


# --------------------------------------------------------------------------- pumps


@dataclass(frozen=True)
class PumpCurve:
    """A centrifugal pump's head against flow, from datasheet points at rated speed.

    Parameters
    ----------
    flow_m3s : Sequence[float]
        Flows of the datasheet points for one pump at rated speed, increasing, the
        first >= 0 [m^3/s].
    head_m : Sequence[float]
        Heads at those flows, not increasing with flow [m].
    speed_ratio : float
        Speed as a fraction of the rated speed, > 0 [-].
    count : int
        Identical pumps running in parallel, >= 1 [-].

    Between points PCHIP (monotone); beyond the last point and below the first the
    curve continues along the end tangent (`beyond_curve` flags where that is used).

    >>> pump = PumpCurve([0.0, 0.05, 0.1], [40.0, 36.0, 25.0])
    >>> float(pump.head(0.05))
    36.0
    >>> round(float(pump.at_speed(1.1).head(0.055)), 9)  # affinity laws: Q x1.1, H x1.21
    43.56
    >>> float(replace(pump, count=2).head(0.1))  # two pumps, 0.05 each
    36.0
    """

    flow_m3s: Sequence[float]
    head_m: Sequence[float]
    speed_ratio: float = field(default=1.0, kw_only=True)
    count: int = field(default=1, kw_only=True)
    _curve: PchipInterpolator = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        q = np.asarray(self.flow_m3s, dtype=float)
        h = np.asarray(self.head_m, dtype=float)
        if q.ndim != 1 or q.size < 2 or q.shape != h.shape:
            raise ValueError(
                "flow_m3s and head_m must be two sequences of the same length, at least 2 points"
            )
        if not (np.all(np.isfinite(q)) and q[0] >= 0 and np.all(np.diff(q) > 0)):
            raise ValueError(f"flow_m3s must start >= 0 and increase strictly; got {q.tolist()}")
        if not (np.all(np.isfinite(h)) and h[0] > 0 and np.all(np.diff(h) <= 0)):
            raise ValueError(
                "head_m must be > 0 at the first point and must not rise with flow (a curve "
                f"with a rising part has no unique operating point); got {h.tolist()}"
            )
        if not (math.isfinite(self.speed_ratio) and self.speed_ratio > 0):
            raise ValueError(f"speed_ratio must be > 0; got {self.speed_ratio!r}")
        if isinstance(self.count, bool) or not isinstance(self.count, int) or self.count < 1:
            raise ValueError(f"count must be a whole number >= 1; got {self.count!r}")
        object.__setattr__(self, "flow_m3s", tuple(q.tolist()))
        object.__setattr__(self, "head_m", tuple(h.tolist()))
        object.__setattr__(self, "_curve", PchipInterpolator(q, h, extrapolate=False))

    def at_speed(self, speed_ratio: float) -> PumpCurve:
        """The same pumps at another speed ratio [-]."""
        return replace(self, speed_ratio=speed_ratio)

    @property
    def max_flow_m3s(self) -> float:
        """Total flow at the last datasheet point, at this speed and count [m^3/s]."""
        return self.flow_m3s[-1] * self.speed_ratio * self.count

    @property
    def shutoff_head_m(self) -> float:
        """Head at zero flow, at this speed [m]."""
        return float(self.head(0.0))

    def _rated_head(self, q1: np.ndarray) -> np.ndarray:
        """Head [m] of one pump at rated speed at flow q1 [m^3/s], extended linearly."""
        q_pts = self.flow_m3s
        h = np.asarray(self._curve(q1), dtype=float)
        lo, hi = q_pts[0], q_pts[-1]
        d = self._curve.derivative()
        slope_hi = float(d(hi))
        slope_lo = float(d(lo))
        h = np.where(q1 > hi, self.head_m[-1] + slope_hi * (q1 - hi), h)
        h = np.where(q1 < lo, self.head_m[0] + slope_lo * (q1 - lo), h)
        return np.asarray(h)

    def head(self, q: npt.ArrayLike, *, speed_ratio: npt.ArrayLike | None = None) -> np.ndarray:
        """Head [m] of the pump set at total flow *q* [m^3/s].

        *speed_ratio* [-] overrides the curve's own speed (arrays broadcast).
        H(Q, N) = N²·H1(Q/(count·N)) (affinity laws).
        """
        s = np.asarray(self.speed_ratio if speed_ratio is None else speed_ratio, dtype=float)
        if np.any(~(s > 0)):
            raise ValueError("speed_ratio must be > 0")
        q_each = np.asarray(q, dtype=float) / self.count
        return np.asarray(s * s * self._rated_head(q_each / s))

    def beyond_curve(
        self, q: npt.ArrayLike, *, speed_ratio: npt.ArrayLike | None = None
    ) -> np.ndarray:
        """True where total flow *q* [m^3/s] lies past the last datasheet point."""
        s = np.asarray(self.speed_ratio if speed_ratio is None else speed_ratio, dtype=float)
        return np.asarray(np.asarray(q, dtype=float) / (self.count * s) > self.flow_m3s[-1])

    def pressure_rise(
        self,
        q: npt.ArrayLike,
        temperature_c: npt.ArrayLike = 20.0,
        *,
        speed_ratio: npt.ArrayLike | None = None,
    ) -> np.ndarray:
        """Pressure rise ρ·g·H [Pa] at total flow *q* [m^3/s] and *temperature_c* [°C]."""
        rho = water.density(temperature_c)
        return np.asarray(rho * water.G * self.head(q, speed_ratio=speed_ratio))


# --------------------------------------------------------------------------- operating point

OperatingStatus = Literal["ok", "beyond_pump_curve", "no_flow", "not_converged"]


@dataclass(frozen=True)
class OperatingPoint:
    """Where the pump curve meets the system curve.

    status: "ok"; "beyond_pump_curve" (the intersection lies past the last datasheet
    point, on the extrapolated curve: numbers given but not to be trusted);
    "no_flow" (the pumps' shut-off pressure does not reach any branch's threshold);
    "not_converged".
    """

    header_pressure_pa: float
    total_flow_m3s: float
    branch_flows_m3s: Mapping[str, float]
    status: OperatingStatus
    message: str
    pump_head_m: float = float("nan")
    branches_without_flow: tuple[str, ...] = ()

    @property
    def ok(self) -> bool:
        """True when the operating point is on the datasheet curve."""
        return self.status == "ok"


def operating_point(
    header: ParallelHeader,
    pump: PumpCurve,
    *,
    conditions: Conditions | None = None,
    temperature_c: float = 20.0,
    speed_ratio: float | None = None,
    xtol_pa: float = 1e-6,
) -> OperatingPoint:
    """Operating point of *pump* on *header*.

    Parameters
    ----------
    header : ParallelHeader
        The branches.
    pump : PumpCurve
        The pump set (its own speed unless *speed_ratio* is given).
    conditions : mapping, optional
        Per-branch condition keywords (scalars); a branch without ``temperature_c``
        gets *temperature_c*.
    temperature_c : float
        Water temperature at the pumps (and default for the branches) [°C].
    speed_ratio : float, optional
        Pump speed ratio [-].
    xtol_pa : float
        Tolerance on the header pressure [Pa].
    """
    pump = pump if speed_ratio is None else pump.at_speed(speed_ratio)
    cond = header._conditions(conditions)
    for c in cond.values():
        c.setdefault("temperature_c", temperature_c)
    rho = float(water.density(temperature_c))
    shutoff = rho * water.G * pump.shutoff_head_m
    thresholds = {k: float(np.max(v)) for k, v in header.thresholds(cond).items()}
    names = [b.name for b in header.branches]
    lowest = min(thresholds.values())
    if shutoff <= lowest:
        return OperatingPoint(
            header_pressure_pa=shutoff,
            total_flow_m3s=0.0,
            branch_flows_m3s=dict.fromkeys(names, 0.0),
            status="no_flow",
            message=(
                f"the pumps' shut-off pressure {shutoff / 1e5:.3f} bar does not reach the "
                f"lowest branch threshold {lowest / 1e5:.3f} bar: no branch can flow"
            ),
            pump_head_m=pump.shutoff_head_m,
            branches_without_flow=tuple(names),
        )

    def excess(p: float) -> float:
        q = float(header.total_flow(p, cond))
        return float(pump.pressure_rise(q, temperature_c)) - p

    try:
        p_op, res = brentq(excess, lowest, shutoff, xtol=xtol_pa, rtol=1e-14, full_output=True)
        converged = bool(res.converged)
    except (ValueError, RuntimeError) as exc:  # no sign change: cannot happen, but say so
        log.warning("operating point: root finding failed: %s", exc)
        return OperatingPoint(
            math.nan, math.nan, dict.fromkeys(names, math.nan), "not_converged", str(exc)
        )
    flows = {k: float(v) for k, v in header.branch_flows(p_op, cond).items()}
    total = sum(flows.values())
    dry = tuple(k for k, v in flows.items() if v <= 0.0)
    head = float(pump.head(total))
    if not converged:
        status: OperatingStatus = "not_converged"
        message = "the operating point did not converge"
    elif bool(pump.beyond_curve(total)):
        status = "beyond_pump_curve"
        message = (
            f"the system takes {total * 3600:.1f} m3/h, past the last datasheet point "
            f"({pump.max_flow_m3s * 3600:.1f} m3/h at this speed): the pumps run out "
            "and the result rests on an extrapolated curve"
        )
    else:
        status = "ok"
        message = "" if not dry else f"no flow in {', '.join(dry)} (header below threshold)"
    return OperatingPoint(float(p_op), total, flows, status, message, head, dry)
