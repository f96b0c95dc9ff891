"""Resistance fit of one branch over one analysis window.

For each sample of a window the branch model gives

    y = P_s − P_static,known(t)                 [Pa]
    x = ΔP_dyn,clean(Q, T, u)  (rest of branch) [Pa]

and the fit finds the **resistance ratio** ``r`` (1.0 = the branch as designed and clean)
in ``y ≈ r·x`` — or ``y ≈ r·x + s`` where the termination pressure is not logged, so the
static back-pressure ``s`` [Pa] is unknown and fitted with ``r``. When a control valve's
position is logged, the valve's own ΔP (computed from its position) is taken off ``y``
first, so ``r`` describes the rest of the branch. Water density and viscosity follow the
logged temperature, so seasonal change is in ``x`` and does not show up in ``r``.

The robust regression itself, its intervals and the identifiability verdict on ``s``
are in `model.robust` (`fit_ratio`), the test of the two hypotheses below on arrays in
`model.offset` (`offset_hypotheses`); `FitResult`, `OffsetComparison` and those
functions are importable from here too.

Windows
-------
The caller cuts the data into windows (default one day; minutes for fast test rigs that
log every second) and screens the samples (pump running, steady, good quality) before
calling; each call fits one branch over one window.

Back-pressure versus resistance
-------------------------------
`compare_offset_hypotheses` takes a baseline ``(r_b, s_b)`` and tests, on one window,
whether the departure from the baseline looks like a constant offset (static
back-pressure changed: ``y − r_b·x − s_b = c``) or like a change of resistance
(``y − s_b = r'·x``, an offset growing with Q²).
"""

from __future__ import annotations

import dataclasses
import logging
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from model import water
from model.branch import Branch, HeldHeader, ReturnHeader, Tank
from model.offset import OffsetComparison, offset_hypotheses
from model.robust import LOSSES, FitResult, Loss, as_1d, fit_ratio

__all__ = [
    "LOSSES",
    "ChangePoint",
    "FitResult",
    "OffsetComparison",
    "StepRule",
    "compare_offset_hypotheses",
    "find_level_step",
    "fit_ratio",
    "fit_resistance",
    "fit_with_change",
    "offset_hypotheses",
]

logger = logging.getLogger(__name__)


# --------------------------------------------------------------------------- branch level


@dataclass(frozen=True)
class _Window:
    y: NDArray[np.float64]
    x: NDArray[np.float64]
    q: NDArray[np.float64]
    w: NDArray[np.float64]
    fit_static: bool
    static_pa: float | None
    keep: NDArray[np.bool_]  # which input samples y, x, q, w hold


def _termination_logged(branch: Branch, level_m: Any, end_pressure_pa: Any) -> bool:
    term = branch.termination
    if isinstance(term, Tank):
        return level_m is not None
    if isinstance(term, HeldHeader | ReturnHeader):
        return end_pressure_pa is not None
    return True  # an open discharge has no termination pressure to log


def _window(
    branch: Branch,
    *,
    header_pressure_pa: ArrayLike,
    flow_m3s: ArrayLike,
    temperature_c: ArrayLike,
    level_m: ArrayLike | None,
    end_pressure_pa: ArrayLike | None,
    valve_position: ArrayLike | None,
    weights: ArrayLike | None,
    fit_static: bool | None,
    configured_static_pa: float | None,
    min_flow_m3s: float,
) -> _Window:
    """The fit's y and x for one branch-window (module docstring)."""
    if not isinstance(branch, Branch):
        raise TypeError(f"branch must be a model.branch.Branch, got {type(branch).__name__}")
    if not (math.isfinite(min_flow_m3s) and min_flow_m3s >= 0.0):
        raise ValueError(f"min_flow_m3s must be a finite number >= 0, got {min_flow_m3s!r}")
    p = as_1d("header_pressure_pa", header_pressure_pa)
    n = p.shape[0]
    q = as_1d("flow_m3s", flow_m3s, n)
    t = as_1d("temperature_c", temperature_c, n)
    lvl = None if level_m is None else as_1d("level_m", level_m, n)
    pe = None if end_pressure_pa is None else as_1d("end_pressure_pa", end_pressure_pa, n)
    u = None if valve_position is None else as_1d("valve_position", valve_position, n)
    w = np.ones(n) if weights is None else as_1d("weights", weights, n)
    ok = np.isfinite(p) & np.isfinite(q) & np.isfinite(t) & np.isfinite(w) & (w > 0.0)
    for arr in (lvl, pe, u):
        if arr is not None:
            ok &= np.isfinite(arr)
    ok &= q > min_flow_m3s
    p, q, t, w = p[ok], q[ok], t[ok], w[ok]
    lvl = None if lvl is None else lvl[ok]
    pe = None if pe is None else pe[ok]
    u = None if u is None else u[ok]

    logged = _termination_logged(branch, lvl, pe)
    do_static = (not logged) if fit_static is None else bool(fit_static)
    term = branch.termination
    static_cfg: float | None
    if do_static and not logged:
        # The termination pressure is unknown: take it out of the known static part
        # (zero level or end pressure) and let s stand for it.
        zeros = np.zeros(p.shape[0])
        if isinstance(term, Tank):
            known = branch.static_pressure(temperature_c=t, level_m=zeros)
            rho = water.density(float(np.median(t))) if t.size else water.density(20.0)
            static_cfg = None if term.level_m is None else float(rho * water.G * term.level_m)
        else:
            known = branch.static_pressure(temperature_c=t, end_pressure_pa=zeros)
            assert isinstance(term, HeldHeader | ReturnHeader)
            static_cfg = (
                term.set_pressure_pa if isinstance(term, HeldHeader) else term.pressure_pa
            )
    else:
        known = branch.static_pressure(temperature_c=t, level_m=lvl, end_pressure_pa=pe)
        static_cfg = 0.0
    if configured_static_pa is not None:
        if not math.isfinite(configured_static_pa):
            raise ValueError(f"configured_static_pa must be finite, got {configured_static_pa}")
        static_cfg = float(configured_static_pa)
    rest, valve = branch.dp_dynamic_parts(q, temperature_c=t, valve_position=u)
    y = np.asarray(p - known - valve, dtype=float)
    return _Window(y, np.asarray(rest, dtype=float), q, w, do_static, static_cfg, ok)


def fit_resistance(
    branch: Branch,
    *,
    header_pressure_pa: ArrayLike,
    flow_m3s: ArrayLike,
    temperature_c: ArrayLike,
    level_m: ArrayLike | None = None,
    end_pressure_pa: ArrayLike | None = None,
    valve_position: ArrayLike | None = None,
    weights: ArrayLike | None = None,
    fit_static: bool | None = None,
    configured_static_pa: float | None = None,
    loss: Loss = "soft_l1",
    min_flow_m3s: float = 0.0,
    **options: Any,
) -> FitResult:
    """Fit the resistance ratio of one branch over one window of screened samples.

    ``s`` is the part of the static back-pressure that the data do not give: the
    termination pressure (tank ``ρ·g·level``, header pressure) when it is not logged.
    Fitting ``s`` is automatic (``fit_static=None``) exactly then; ``fit_static=True`` with a
    logged termination fits an extra constant offset on top of it.

    Parameters
    ----------
    branch : the branch model (`model.branch.Branch`)
    header_pressure_pa : supply header pressure per sample [Pa gauge]
    flow_m3s : branch flow per sample [m^3/s]
    temperature_c : water temperature per sample [°C]
    level_m : logged tank level per sample [m], or None
    end_pressure_pa : logged termination pressure per sample [Pa gauge], or None
    valve_position : logged control-valve position per sample [-] (0–1), or None
    weights : relative sample weights [-], or None
    fit_static : fit ``s`` [Pa]; None = when the termination pressure is not logged
    configured_static_pa : back-pressure ``s`` [Pa] to fall back to; default the
        termination's configured value (tank ``ρ·g·level_m``, header set point)
    loss : "soft_l1", "huber" or "linear"
    min_flow_m3s : flow floor [m^3/s]; samples at or below it are left out
    options : passed to `fit_ratio` (``min_samples``, ``max_corr``, ``min_flow_span``,
        ``max_r_rel_halfwidth``, ``confidence``)

    Samples with a NaN in any input are left out. Returns a `FitResult`.
    """
    win = _window(
        branch,
        header_pressure_pa=header_pressure_pa,
        flow_m3s=flow_m3s,
        temperature_c=temperature_c,
        level_m=level_m,
        end_pressure_pa=end_pressure_pa,
        valve_position=valve_position,
        weights=weights,
        fit_static=fit_static,
        configured_static_pa=configured_static_pa,
        min_flow_m3s=min_flow_m3s,
    )
    return fit_ratio(
        win.y,
        win.x,
        flow=win.q,
        weights=win.w,
        fit_static=win.fit_static,
        static_pa=win.static_pa,
        loss=loss,
        **options,
    )


def compare_offset_hypotheses(
    branch: Branch,
    *,
    header_pressure_pa: ArrayLike,
    flow_m3s: ArrayLike,
    temperature_c: ArrayLike,
    r_baseline: float,
    s_baseline_pa: float,
    level_m: ArrayLike | None = None,
    end_pressure_pa: ArrayLike | None = None,
    valve_position: ArrayLike | None = None,
    weights: ArrayLike | None = None,
    fit_static: bool | None = None,
    min_flow_m3s: float = 0.0,
    **options: Any,
) -> OffsetComparison:
    """Back-pressure change or resistance change? One branch, one window.

    ``y`` and ``x`` are built as in `fit_resistance` with the same *fit_static* choice, so
    *s_baseline_pa* [Pa] is in the sense of ``FitResult.s_pa`` (or ``s_fixed_pa``) of the
    baseline fit; *r_baseline* [-] is the baseline ratio. *options* go to
    `offset_hypotheses` (``min_samples``, ``evidence_threshold``). Other parameters as
    in `fit_resistance`.
    """
    win = _window(
        branch,
        header_pressure_pa=header_pressure_pa,
        flow_m3s=flow_m3s,
        temperature_c=temperature_c,
        level_m=level_m,
        end_pressure_pa=end_pressure_pa,
        valve_position=valve_position,
        weights=weights,
        fit_static=fit_static,
        configured_static_pa=None,
        min_flow_m3s=min_flow_m3s,
    )
    return offset_hypotheses(
        win.y,
        win.x,
        r_baseline=r_baseline,
        s_baseline_pa=s_baseline_pa,
        flow=win.q,
        weights=win.w,
        **options,
    )


# ------------------------------------------------------------------- change inside a window


@dataclass(frozen=True)
class ChangePoint:
    """A change part-way through a window: where the window's tail starts.

    Attributes
    ----------
    index : first sample of the tail, as an index into the arrays given to `fit_with_change`
    time_s : its time [s], on the caller's clock
    reduction : 1 − SSE(head and tail fitted apart) / SSE(one fit) [-]
    gain : that drop of the SSE over the residual variance of the split fit [-]: about
        the number of parameters when nothing changed, hundreds for a real step
    change : size of the change: the tail's departure from the head's model over the
        tail's mean clean dynamic ΔP [-] (``signal`` "relation"), or the step of the
        logged end pressure [Pa] (``signal`` "end_pressure")
    signal : ``"relation"`` (y against x changed: resistance or unlogged back-pressure)
        or ``"end_pressure"`` (the logged termination pressure stepped)
    """

    index: int
    time_s: float
    reduction: float
    gain: float
    change: float
    signal: str


def _prefix(*columns: NDArray[np.float64]) -> list[NDArray[np.float64]]:
    """Prefix sums of each column, with a leading 0 (one cumsum over all of them)."""
    stacked = np.zeros((len(columns), columns[0].shape[0] + 1))
    np.cumsum(np.vstack(columns), axis=1, out=stacked[:, 1:])
    return list(stacked)


def _candidates(t: NDArray[np.float64], min_head_s: float, min_tail_s: float,
                min_samples: int) -> NDArray[np.intp]:
    """Tail starts k (head = samples [0, k)) that leave both parts long enough."""
    n = t.shape[0]
    k = np.arange(n)
    step = float(np.min(np.diff(t))) if n > 1 else 0.0  # the sampling step: the last
    # sample stands for one step of time
    ok = (k >= min_samples) & (n - k >= min_samples)
    ok &= (t - t[0] >= min_head_s) & (t[-1] - t + step >= min_tail_s)
    return k[ok]


def _line_residual(x: NDArray[np.float64], y: NDArray[np.float64],
                   sw: NDArray[np.float64]) -> NDArray[np.float64]:
    """Weighted residuals of the least-squares line ``y ≈ r·x + s`` [unit of y]."""
    a = np.column_stack([x, np.ones_like(x)]) * sw[:, None]
    coef, *_ = np.linalg.lstsq(a, y * sw, rcond=None)
    return np.asarray(y * sw - a @ coef, dtype=float)


def _independence(residual: NDArray[np.float64]) -> float:
    """(1 − ρ)/(1 + ρ) for the lag-1 autocorrelation ρ > 0 of *residual*, else 1 [-].

    The F statistic of a split counts every sample as independent; residuals that wander
    (an unlogged back-pressure drifting, a model error following the load) carry fewer
    independent samples — about n·(1 − ρ)/(1 + ρ) for AR(1) residuals, the effective
    sample size of Bayley & Hammersley (1946; reference from memory) — and make a chance
    split look significant.
    """
    e = residual - float(np.mean(residual))
    den = float(np.dot(e, e))
    if e.size < 3 or den <= 0.0:
        return 1.0
    rho = float(np.dot(e[1:], e[:-1])) / den
    return (1.0 - rho) / (1.0 + rho) if rho > 0.0 else 1.0


def _relation_change(
    y: NDArray[np.float64], x: NDArray[np.float64], w: NDArray[np.float64],
    t: NDArray[np.float64], rule: StepRule,
) -> ChangePoint | None:
    """Best split of ``y ≈ r·x + s`` into a head and a tail fitted apart (least squares
    from prefix sums: every split point in one pass).

    Each part has its own offset, and so does the one fit it is compared with: a
    back-pressure that differs from the model all day (an unlogged gas blanket) is an
    offset, not a step, and must not split every day where the load turns.
    """
    ks = _candidates(t, rule.min_head_s, rule.min_tail_s, rule.min_samples)
    n = y.shape[0]
    if ks.size == 0 or n <= 4:
        return None
    scale = float(np.mean(np.abs(x))) or 1.0
    xs, ys = x / scale, y / scale  # O(1) numbers: the sums below lose nothing
    cw, cx, cy, cxx, cxy, cyy = _prefix(w, w * xs, w * ys, w * xs * xs, w * xs * ys, w * ys * ys)

    def sse(a: NDArray[np.intp] | int, b: NDArray[np.intp] | int) -> Any:
        sw, sx, sy = cw[b] - cw[a], cx[b] - cx[a], cy[b] - cy[a]
        sxx, sxy, syy = cxx[b] - cxx[a], cxy[b] - cxy[a], cyy[b] - cyy[a]
        det = sw * sxx - sx * sx
        with np.errstate(divide="ignore", invalid="ignore"):
            fit = (sxx * sy * sy - 2.0 * sx * sy * sxy + sw * sxy * sxy) / det
        return np.maximum(syy - np.where(det > 0, fit, sy * sy / sw), 0.0)

    whole = float(sse(0, n))
    if not whole > 0.0:
        return None
    split = sse(0, ks) + sse(ks, n)
    best = int(np.argmin(split))
    k = int(ks[best])
    rest = float(split[best])
    reduction = 1.0 - rest / whole
    gain = (whole - rest) / 2.0 / max(rest / (n - 4), 1e-300)  # F with 2 and n − 4 dof
    if gain < rule.min_gain:
        return None  # the common case: nothing happened, no need to size it
    sw = np.sqrt(w)
    residual = np.concatenate([_line_residual(xs[:k], ys[:k], sw[:k]),
                               _line_residual(xs[k:], ys[k:], sw[k:])])
    gain *= _independence(residual)
    if gain < rule.min_gain:
        return None
    # size: one fit of the whole window with the tail allowed either an extra offset or
    # an extra ratio, whichever fits better; as a fraction of the clean dynamic ΔP
    after = (np.arange(n) >= k).astype(float)
    best_sse, change = math.inf, math.nan
    for extra in (after, after * xs):
        a = np.column_stack([xs, np.ones(n), extra]) * sw[:, None]
        coef, *_ = np.linalg.lstsq(a, ys * sw, rcond=None)
        e = float(np.sum((ys * sw - a @ coef) ** 2))
        if e < best_sse:
            tail_x = float(np.mean(xs[k:]))
            size = coef[2] / tail_x if extra is after else coef[2]
            best_sse, change = e, float(size) if tail_x > 0 else math.nan
    if not abs(change) >= rule.min_change:
        return None
    return ChangePoint(k, float(t[k]), reduction, gain, float(change), "relation")


def find_level_step(
    time_s: ArrayLike,
    values: ArrayLike,
    *,
    min_head_s: float = 3600.0,
    min_tail_s: float = 3600.0,
    min_samples: int = 6,
    min_gain: float = 60.0,
    min_step: float = 1.0e4,
) -> ChangePoint | None:
    """A single step of a logged level — a termination pressure [Pa] — inside a window.

    The best split into two means (prefix sums: every split point in one pass) is kept
    when the drop of the sum of squares is *min_gain* times the split's residual
    variance and the step is at least *min_step* (unit of *values*); both parts as in
    `fit_with_change`. Samples with a NaN are left out; ``index`` refers to *values*.

    >>> t = np.arange(48) * 1800.0
    >>> v = np.where(t >= 15 * 3600, 2.3e5, 2.0e5) + np.tile([150.0, -150.0], 24)
    >>> step = find_level_step(t, v)
    >>> step.time_s / 3600, round(step.change)
    (15.0, 30000)
    """
    t_all = as_1d("time_s", time_s)
    v_all = as_1d("values", values, t_all.shape[0])
    keep = np.isfinite(t_all) & np.isfinite(v_all)
    t, v = t_all[keep], v_all[keep]
    if t.size < 2 * min_samples or np.any(np.diff(t) <= 0):
        return None
    ks = _candidates(t, min_head_s, min_tail_s, min_samples)
    if ks.size == 0:
        return None
    centred = v - float(np.mean(v))
    c1, c2 = _prefix(centred, centred * centred)
    n = v.shape[0]

    def sse(a: NDArray[np.intp] | int, b: NDArray[np.intp] | int) -> Any:
        m = np.asarray(b) - np.asarray(a)
        return (c2[b] - c2[a]) - (c1[b] - c1[a]) ** 2 / m

    whole = float(sse(0, n))
    if not whole > 0.0:
        return None
    split = sse(0, ks) + sse(ks, n)
    best = int(np.argmin(split))
    k = int(ks[best])
    step = float((c1[n] - c1[k]) / (n - k) - c1[k] / k)
    rest = float(split[best])
    gain = (whole - rest) / max(rest / (n - 2), 1e-300)  # F with 1 and n − 2 dof
    if gain >= min_gain:  # wandering readings count as fewer samples (`_independence`)
        gain *= _independence(np.concatenate([v[:k] - np.mean(v[:k]), v[k:] - np.mean(v[k:])]))
    if gain < min_gain or abs(step) < min_step:
        return None
    index = int(np.flatnonzero(keep)[k])
    return ChangePoint(index, float(t[k]), 1.0 - rest / whole, gain, step, "end_pressure")


@dataclass(frozen=True)
class StepRule:
    """What counts as a step inside a window (`fit_with_change`): both parts last
    *min_head_s* / *min_tail_s* [s] and hold *min_samples* samples; the split's F
    statistic is at least *min_gain* [-]; the change is at least *min_change* of the clean
    dynamic ΔP [-], or *min_pressure_step_pa* [Pa] for a logged end pressure."""

    min_head_s: float = 3600.0
    min_tail_s: float = 3600.0
    min_samples: int = 6
    min_gain: float = 60.0
    min_change: float = 0.05
    min_pressure_step_pa: float = 1.0e4
    #: scan a given end pressure too (off where the caller scans it on more samples)
    end_pressure: bool = True


def _change_in(
    win: _Window, time_s: ArrayLike, end_pressure_pa: ArrayLike | None, rule: StepRule
) -> ChangePoint | None:
    t_all = as_1d("time_s", time_s, win.keep.shape[0])
    keep = win.keep & np.isfinite(t_all)
    t = t_all[keep]
    if t.size < 2 * rule.min_samples or np.any(np.diff(t) <= 0):
        return None
    inner = keep[win.keep]  # the window's samples that also have a time
    rel = None
    if win.fit_static or win.static_pa is not None:
        rel = _relation_change(win.y[inner], win.x[inner], win.w[inner], t, rule)
    if rel is not None:
        rel = dataclasses.replace(rel, index=int(np.flatnonzero(keep)[rel.index]))
    lvl = None
    if end_pressure_pa is not None and rule.end_pressure:
        pe = np.where(keep, as_1d("end_pressure_pa", end_pressure_pa, keep.shape[0]), np.nan)
        lvl = find_level_step(t_all, pe, min_head_s=rule.min_head_s,
                              min_tail_s=rule.min_tail_s, min_samples=rule.min_samples,
                              min_gain=rule.min_gain, min_step=rule.min_pressure_step_pa)
    found = [c for c in (rel, lvl) if c is not None]
    return max(found, key=lambda c: c.reduction) if found else None


def fit_with_change(
    branch: Branch,
    *,
    time_s: ArrayLike,
    header_pressure_pa: ArrayLike,
    flow_m3s: ArrayLike,
    temperature_c: ArrayLike,
    level_m: ArrayLike | None = None,
    end_pressure_pa: ArrayLike | None = None,
    valve_position: ArrayLike | None = None,
    min_flow_m3s: float = 0.0,
    rule: StepRule | None = None,
    **options: Any,
) -> tuple[FitResult, ChangePoint | None]:
    """`fit_resistance` of one window, and a step part-way through it (or None).

    The window's samples (in time order, *time_s* [s]) are split at every admissible
    point into a head and a tail, each fitted apart with ``y ≈ r·x + s`` (``y`` and ``x``
    as in `fit_resistance`), and the split that explains most of the one fit's residual
    is kept when the drop of the residual sum of squares is at least ``min_gain`` times
    the split fit's residual variance (a change-point F statistic, with a threshold far
    above what noise and serially correlated residuals make of the best of a day's split
    points) and the tail departs from the whole window's model by at least
    ``min_change`` of its clean dynamic ΔP (a throttled valve, a blockage, an unlogged
    back-pressure step). A logged end pressure is scanned for a single mean shift the
    same way (`find_level_step`). Thresholds: *rule* (`StepRule`). A fouling ramp never
    passes: it does not jump. Fitting the tail alone then gives the new state within the
    window the step came in, rather than a day's mixture of old and new.

    The model is evaluated once for both. *options* go to `fit_ratio`; the rest as in
    `fit_resistance`. Returns ``(FitResult, ChangePoint | None)``.
    """
    win = _window(
        branch,
        header_pressure_pa=header_pressure_pa,
        flow_m3s=flow_m3s,
        temperature_c=temperature_c,
        level_m=level_m,
        end_pressure_pa=end_pressure_pa,
        valve_position=valve_position,
        weights=None,
        fit_static=None,
        configured_static_pa=None,
        min_flow_m3s=min_flow_m3s,
    )
    fit = fit_ratio(win.y, win.x, flow=win.q, weights=win.w, fit_static=win.fit_static,
                    static_pa=win.static_pa, **options)
    return fit, _change_in(win, time_s, end_pressure_pa, rule or StepRule())
