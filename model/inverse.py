"""The inverse of a branch curve: the flow Q at a header pressure, for whole arrays.

`model.branch.Branch.flow` and `stacked_flows` (one branch, or many branches stacked
along a new first axis) hand their dynamic curves here as coefficients (`DynamicCurve`) and
solve ΔP_dyn(Q) = P_s − P_static by bracketed root finding: safeguarded Newton steps on
ln Q, where the curve is almost a straight line of slope 1–2, inside a bracket that every
evaluation narrows (see `_solve_block`). Large arrays are solved in cache-sized blocks
(`solve_curve`). A branch carries no flow at or below its threshold P_static (nor below
1 nPa above it), and never negative flow.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from model.friction import RE_LAMINAR, RE_TURBULENT, friction_factor_slope

if TYPE_CHECKING:  # only for annotations: model.branch imports this module
    from model.branch import Branch

__all__ = ["DynamicCurve", "header_pressures", "solve_curve", "stacked_flows"]

log = logging.getLogger(__name__)

_Y_MIN_PA = 1e-9
_X_TOL = 1e-12  # on ln Q: a relative flow error below 1e-12
_STEP_TOL = 1e-7  # a Newton step below this leaves an error of order step² ~ 1e-15
_MAX_ITER = 100  # bisection after 12 steps halves the bracket each time: ample


@dataclass(frozen=True)
class DynamicCurve:
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


def _map_curve(curve: DynamicCurve, fn: Callable[[np.ndarray], np.ndarray]) -> DynamicCurve:
    return DynamicCurve(
        fn(curve.rho),
        fn(curve.quad),
        tuple((fn(k), fn(g), fn(e)) for k, g, e in curve.pipes),
        tuple((fn(a), fn(n)) for a, n in curve.equipment),
        fn(curve.q_ref),
    )


def _arrays(curve: DynamicCurve) -> list[np.ndarray]:
    out = [curve.rho, curve.quad, curve.q_ref]
    for k, g, e in curve.pipes:
        out += [k, g, e]
    for a, n in curve.equipment:
        out += [a, n]
    return [np.asarray(a) for a in out]


def solve_curve(curve: DynamicCurve, y: np.ndarray, name: str) -> np.ndarray:
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


def _solve_block(curve: DynamicCurve, y: np.ndarray, name: str) -> np.ndarray:
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
    p_s = header_pressures(header_pressure_pa)
    pairs = zip(branches, conditions, strict=True)
    prepared = [b.dynamic_curve(**c) for b, c in pairs]
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
    stacked = DynamicCurve(
        stack([np.asarray(c.rho) for c in curves]),
        stack([np.asarray(c.quad) for c in curves]),
        pipes,  # type: ignore[arg-type]
        equipment,  # type: ignore[arg-type]
        stack([np.asarray(c.q_ref) for c in curves]),
    )
    static = stack([np.asarray(s) for s, _ in prepared])
    q = solve_curve(stacked, p_s - static, "stack")
    return [q[i] for i in range(n)]


def header_pressures(header_pressure_pa: npt.ArrayLike) -> np.ndarray:
    """Header pressures [Pa gauge] as a float array; NaN is refused."""
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
