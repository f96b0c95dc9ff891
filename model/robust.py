"""Robust regression on arrays: the resistance-ratio fit ``y ≈ r·x (+ s)`` and its
intervals.

`fit_ratio` fits one window given as arrays and returns a `FitResult`; `as_1d` checks
such arrays. Building ``y`` and ``x`` from a branch model is `model.fit`'s job; telling
a back-pressure change from a resistance change on one window is `model.offset`'s.

Method
------
Robust weighted least squares by iteratively re-weighted least squares (IRLS; Holland &
Welsch 1977) with the Huber or soft-L1 (pseudo-Huber) loss; the residual scale is
re-estimated at each iteration from the normalised median absolute deviation
(1.4826·MAD). The covariance of the estimate is Huber's sandwich form (Huber 1981,
*Robust Statistics*, §7.6, eq. 6.5; the "H1" covariance of statsmodels' RLM)::

    Cov = K² · [Σψ(u)²/(n − p)] / [mean ψ'(u)]² · σ̂² · (XᵀWX)⁻¹
    K   = 1 + (p/n) · var ψ'(u) / [mean ψ'(u)]²

with ``u`` the scaled residuals. 95 % intervals use Student's t with ``n − p`` degrees of
freedom. Samples of one window are in time order and their residuals are often serially
correlated (an unlogged back-pressure that wanders, a small model error that follows the
daily cycle): with ``serial=True`` (default) the covariance is also estimated from the
block sums of the scores over ``blocks`` contiguous stretches of the window (cluster-
robust sandwich, Cameron & Miller 2015) and the wider of the two is used, with t on
``blocks − 1`` degrees of freedom. The day-to-day scatter of ``r`` remains the
diagnosis' measure of noise.

Identifiability of ``s``
------------------------
With ``x ∝ Q²`` the two columns ``[x, 1]`` are nearly collinear when the window covers a
narrow flow range: the fit cannot tell "more back-pressure" from "more resistance". The
verdict is "not identifiable" when any of these holds (thresholds are keyword options):

* the correlation of the ``s`` and ``r`` estimates, |ρ_sr|, exceeds ``max_corr`` (0.99);
* the relative flow span (Q₉₅ − Q₅)/Q₅₀ is below ``min_flow_span`` (0.2);
* the 95 % interval of ``r`` is wider than ±``max_r_rel_halfwidth`` (10 %) of ``r``.

Then no number is reported for ``s``: ``r`` is fitted again with ``s`` fixed at the
configured back-pressure (``s_fixed_pa``) and the status says ``"not_identifiable"``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

__all__ = [
    "LOSSES",
    "FitResult",
    "Loss",
    "as_1d",
    "fit_ratio",
]

Loss = Literal["linear", "huber", "soft_l1"]
LOSSES: tuple[str, ...] = ("linear", "huber", "soft_l1")

# Tuning constants in units of the residual scale: 1.345 gives the Huber estimator 95 %
# efficiency at the normal distribution (Huber 1981); for soft-L1 (pseudo-Huber) the
# same constant gives close to the same efficiency (from memory).
_TUNING = {"linear": math.inf, "huber": 1.345, "soft_l1": 1.345}
_MAD_TO_SIGMA = 1.482602218505602  # 1/Φ⁻¹(3/4): MAD → σ at the normal distribution


#: Fit statuses whose ``r`` the diagnosis may use (`FitResult.usable`).
USABLE_STATUSES: tuple[str, ...] = ("ok", "not_identifiable")


@dataclass(frozen=True)
class FitResult:
    """Resistance fit of one branch over one window.

    Attributes
    ----------
    r, r_low, r_high : resistance ratio and its 95 % interval [-] (NaN when not fitted).
    s_pa, s_low_pa, s_high_pa : fitted static back-pressure and interval [Pa]; NaN when
        ``s`` was not fitted or not identifiable.
    s_fixed_pa : back-pressure held fixed in the fit [Pa]; NaN when ``s`` was fitted.
    identifiable : whether ``s`` and ``r`` could be separated (True when ``s`` was not
        asked for).
    fit_static : whether a fit of ``s`` was asked for.
    samples : samples used (finite, positive weight, flow above the floor).
    flow_min_m3s, flow_max_m3s : flow range covered [m^3/s].
    flow_span : relative flow span (Q₉₅ − Q₅)/Q₅₀ [-].
    residual_std_pa : robust residual scatter 1.4826·MAD [Pa].
    residual_autocorr : lag-1 autocorrelation of the residuals [-] (a diagnostic: near 1
        the residuals drift rather than scatter).
    mean_flow_m3s : weighted mean flow of the samples used [m^3/s].
    sum_w, sum_x, sum_y, sum_xx, sum_xy, sum_yy : weighted sums over the samples used of
        1, x, y, x², x·y, y² (weights scaled to mean 1, so ``sum_w`` = samples) [-], [Pa],
        [Pa], [Pa²], [Pa²], [Pa²]: enough to test later any baseline ``(r_b, s_b)``
        against "constant offset" and "offset ∝ Q²" without the samples (y before the
        fixed back-pressure ``s_fixed_pa`` is taken off).
    corr_rs : correlation of the ``s`` and ``r`` estimates [-] (NaN when ``s`` not fitted).
    iterations : IRLS iterations of the final fit.
    status : ``"ok"``, ``"not_identifiable"`` (``r`` valid with ``s`` fixed, or NaN when
        there was no back-pressure to fix), ``"too_few_samples"``, ``"no_flow"``,
        ``"not_converged"``.
    message : one plain sentence.
    loss : the loss used.
    """

    r: float
    r_low: float
    r_high: float
    s_pa: float
    s_low_pa: float
    s_high_pa: float
    s_fixed_pa: float
    identifiable: bool
    fit_static: bool
    samples: int
    flow_min_m3s: float
    flow_max_m3s: float
    flow_span: float
    residual_std_pa: float
    corr_rs: float
    iterations: int
    status: str
    message: str
    loss: str
    residual_autocorr: float = math.nan
    mean_flow_m3s: float = math.nan
    sum_w: float = math.nan
    sum_x: float = math.nan
    sum_y: float = math.nan
    sum_xx: float = math.nan
    sum_xy: float = math.nan
    sum_yy: float = math.nan

    @property
    def usable(self) -> bool:
        """True when ``r`` is a number the diagnosis may use."""
        return math.isfinite(self.r) and self.status in USABLE_STATUSES


@dataclass(frozen=True)
class _Irls:
    beta: NDArray[np.float64]
    cov: NDArray[np.float64]
    scale: float
    iterations: int
    converged: bool
    psi: NDArray[np.float64]  # ψ of the scaled residuals at the solution, sample order
    dpsi: NDArray[np.float64]  # ψ' of the same


def _psi(u: NDArray[np.float64], loss: str, k: float) -> tuple[NDArray[np.float64], ...]:
    """ψ(u), ψ'(u) and the IRLS weight ψ(u)/u for scaled residuals ``u``."""
    if loss == "linear":
        one = np.ones_like(u)
        return u, one, one
    if loss == "huber":
        a = np.abs(u)
        inside = a <= k
        psi = np.where(inside, u, k * np.sign(u))
        dpsi = inside.astype(float)
        w = np.where(inside, 1.0, k / np.maximum(a, 1e-300))
        return psi, dpsi, w
    # soft-L1 / pseudo-Huber: ρ(u) = k²(√(1 + (u/k)²) − 1)
    t = 1.0 + (u / k) ** 2
    w = 1.0 / np.sqrt(t)
    return u * w, w / t, w


def _median(v: NDArray[np.float64]) -> float:
    """Median of finite values, as `numpy.median` computes it, without its overhead (a
    fit takes two per iteration)."""
    n = v.shape[0]
    h = n // 2
    if n % 2:
        return float(np.partition(v, h)[h])
    part = np.partition(v, (h - 1, h))
    return float((part[h - 1] + part[h]) / 2.0)


def _robust_scale(e: NDArray[np.float64]) -> float:
    med = _median(e)
    return _MAD_TO_SIGMA * _median(np.abs(e - med))


def _solve_normal(ata: NDArray[np.float64], atb: NDArray[np.float64]) -> NDArray[np.float64]:
    """β from the normal equations ``AᵀWA β = AᵀWb``: closed form for one and two
    parameters (the resistance fits), least squares otherwise or when singular."""
    p = atb.shape[0]
    if p == 1 and ata[0, 0] > 0.0:
        return atb / ata[0, 0]
    if p == 2:
        det = ata[0, 0] * ata[1, 1] - ata[0, 1] * ata[1, 0]
        # Far from singular only: near it, lstsq's minimum-norm answer is the one to give.
        if det > 1e-10 * ata[0, 0] * ata[1, 1]:
            return np.array([
                (ata[1, 1] * atb[0] - ata[0, 1] * atb[1]) / det,
                (ata[0, 0] * atb[1] - ata[1, 0] * atb[0]) / det,
            ])
    beta, *_ = np.linalg.lstsq(ata, atb, rcond=None)
    return np.asarray(beta, dtype=float)


def _irls(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    loss: str,
    *,
    max_iter: int = 50,
    rtol: float = 1e-8,
) -> _Irls:
    """Robust regression ``b ≈ a·β`` on whitened columns ``a`` (n×p) and data ``b``.

    Stops when an iteration moves β by at most ``rtol·max(1, max|β|)``: with 1e-8 the
    ratio is settled to about 1e-8 relative, far inside any interval it is reported with
    (1e-10 took a third more iterations for digits nobody reads).
    """
    n, p = a.shape
    k = _TUNING[loss]
    beta, *_ = np.linalg.lstsq(a, b, rcond=None)
    scale = 0.0
    converged = loss == "linear"
    it = 0
    if loss != "linear":
        for it in range(1, max_iter + 1):  # noqa: B007 - iteration count reported
            e = b - a @ beta
            scale = _robust_scale(e)
            if scale <= 0.0:
                # More than half the residuals are exactly zero: the fit is exact there.
                converged = True
                break
            _, _, w = _psi(e / scale, loss, k)
            aw = a * w[:, None]
            new = _solve_normal(aw.T @ a, aw.T @ b)
            step = float(np.max(np.abs(new - beta)))
            beta = new
            if step <= rtol * max(1.0, float(np.max(np.abs(beta)))):
                converged = True
                break
    e = b - a @ beta
    scale = _robust_scale(e)
    if scale <= 0.0:
        scale = float(np.sqrt(np.mean(e**2)))
    psi = np.zeros(n)
    dpsi = np.zeros(n)
    if scale <= 0.0 or n <= p:
        cov = np.zeros((p, p))
    else:
        u = e / scale
        psi, dpsi, _ = _psi(u, loss, k)
        m = float(np.mean(dpsi))
        if m <= 0.0:
            cov = np.full((p, p), np.nan)
        else:
            kk = 1.0 + (p / n) * float(np.var(dpsi)) / m**2
            factor = kk**2 * float(np.sum(psi**2)) / (n - p) / m**2 * scale**2
            cov = factor * np.linalg.pinv(a.T @ a)
    return _Irls(
        beta=np.asarray(beta, dtype=float),
        cov=cov,
        scale=scale,
        iterations=it,
        converged=converged,
        psi=np.asarray(psi, dtype=float),
        dpsi=np.asarray(dpsi, dtype=float),
    )


def _lag1(psi: NDArray[np.float64]) -> float:
    """Lag-1 autocorrelation of the residual series [-] (NaN when undefined)."""
    if psi.size < 3:
        return math.nan
    a = psi - float(np.mean(psi))
    den = float(np.dot(a, a))
    return float(np.dot(a[1:], a[:-1]) / den) if den > 0.0 else math.nan


def _serial_cov(
    a: NDArray[np.float64], fit: _Irls, blocks: int
) -> tuple[NDArray[np.float64], int]:
    """Covariance that allows for serially correlated residuals, and its degrees of freedom.

    The window is cut into *blocks* contiguous stretches and the M-estimator's sandwich
    is built from the block sums of the scores ψ(u)·a — the cluster-robust covariance
    with time blocks as clusters (Cameron & Miller 2015, J. Human Resources 50, 317,
    §VI), with the small-sample factor G/(G − 1) and t with G − 1 degrees of freedom.
    Residuals that drift together (an unlogged pressure wandering, a model error that
    follows the daily cycle) carry less information than independent ones; this widens
    the interval for them. The wider of this and Huber's covariance is returned.
    """
    n, p = a.shape
    g = min(blocks, n // 5)
    if g < 4 or fit.scale <= 0.0:
        return fit.cov, n - p
    m = (a * fit.dpsi[:, None]).T @ a
    if not np.all(np.isfinite(m)) or np.linalg.matrix_rank(m) < p:
        return fit.cov, n - p
    starts = np.array([c[0] for c in np.array_split(np.arange(n), g)])
    sums = np.add.reduceat(a * fit.psi[:, None], starts, axis=0)
    m_inv = np.linalg.inv(m)
    cov = g / (g - 1.0) * fit.scale**2 * (m_inv @ (sums.T @ sums) @ m_inv)
    if cov[0, 0] > fit.cov[0, 0]:
        return cov, g - 1
    return fit.cov, n - p


def as_1d(name: str, value: ArrayLike, n: int | None = None) -> NDArray[np.float64]:
    """*value* as a 1-D float array; a scalar is repeated to *n* samples when *n* is
    given, and the length must then be *n*. Errors name the argument *name*."""
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 0 and n is not None:
        arr = np.full(n, float(arr))
    if arr.ndim != 1:
        raise ValueError(f"{name} must be a 1-D array, got shape {arr.shape}")
    if n is not None and arr.shape[0] != n:
        raise ValueError(f"{name} has {arr.shape[0]} samples, expected {n}")
    return arr


def _result(**kw: Any) -> FitResult:
    nan = math.nan
    base: dict[str, Any] = {
        "r": nan, "r_low": nan, "r_high": nan, "s_pa": nan, "s_low_pa": nan,
        "s_high_pa": nan, "s_fixed_pa": nan, "identifiable": False, "fit_static": False,
        "samples": 0, "flow_min_m3s": nan, "flow_max_m3s": nan, "flow_span": nan,
        "residual_std_pa": nan, "corr_rs": nan, "iterations": 0, "status": "ok",
        "message": "", "loss": "soft_l1",
    }  # fmt: skip
    base.update(kw)
    return FitResult(**base)


def fit_ratio(
    y: ArrayLike,
    x: ArrayLike,
    *,
    flow: ArrayLike | None = None,
    weights: ArrayLike | None = None,
    fit_static: bool = False,
    static_pa: float | None = 0.0,
    loss: Loss = "soft_l1",
    min_samples: int = 10,
    max_corr: float = 0.99,
    min_flow_span: float = 0.2,
    max_r_rel_halfwidth: float = 0.10,
    confidence: float = 0.95,
    serial: bool = True,
    blocks: int = 12,
) -> FitResult:
    """Fit ``y ≈ r·x (+ s)`` robustly on arrays.

    Parameters
    ----------
    y : P_s − known static pressure (and minus a logged valve's ΔP) per sample [Pa]
    x : clean dynamic ΔP of the rest of the branch per sample [Pa]; samples with
        ``x ≤ 0`` carry no flow and are left out
    flow : branch flow per sample [m^3/s], for the flow-range figures; when omitted
        ``√x`` stands in for it (x ∝ Q² in turbulent flow)
    weights : relative sample weights [-] (e.g. inverse variance); non-positive drops
    fit_static : fit ``s`` [Pa] along with ``r``
    static_pa : back-pressure ``s`` [Pa] held fixed when ``s`` is not fitted, and the
        fall-back when it is not identifiable; ``None`` = no configured value
    loss : ``"soft_l1"`` (default), ``"huber"`` or ``"linear"`` (ordinary LS)
    min_samples : fewest samples to fit [-]
    max_corr, min_flow_span, max_r_rel_halfwidth : identifiability thresholds [-]
        (module docstring)
    confidence : level of the intervals [-]
    serial : the samples are in time order: allow for serially correlated residuals in
        the intervals (block covariance, module docstring)
    blocks : contiguous time blocks for that covariance [-] (12: two hours of a day)

    Returns
    -------
    FitResult

    Examples
    --------
    >>> q = np.linspace(0.02, 0.05, 50)
    >>> x = 4.0e7 * q**2
    >>> res = fit_ratio(1.3 * x + 2.0e4, x, flow=q, fit_static=True)
    >>> round(res.r, 6), round(res.s_pa, 3), res.status
    (1.3, 20000.0, 'ok')
    """
    if loss not in LOSSES:
        raise ValueError(f"loss must be one of {LOSSES}, got {loss!r}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be in (0, 1), got {confidence}")
    if min_samples < 3:
        raise ValueError(f"min_samples must be at least 3, got {min_samples}")
    y_arr = as_1d("y", y)
    n_all = y_arr.shape[0]
    x_arr = as_1d("x", x, n_all)
    w_arr = np.ones(n_all) if weights is None else as_1d("weights", weights, n_all)
    q_arr = np.sqrt(np.clip(x_arr, 0.0, None)) if flow is None else as_1d("flow", flow, n_all)
    if not fit_static and static_pa is None:
        raise ValueError("static_pa must be given when fit_static is False")

    finite = np.isfinite(y_arr) & np.isfinite(x_arr) & np.isfinite(w_arr) & np.isfinite(q_arr)
    use = finite & (w_arr > 0.0)
    flowing = use & (x_arr > 0.0)
    common: dict[str, Any] = {"fit_static": fit_static, "loss": loss}
    if not flowing.any():
        return _result(status="no_flow", message="no sample in the window carries flow", **common)
    y_u, x_u, w_u, q_u = y_arr[flowing], x_arr[flowing], w_arr[flowing], q_arr[flowing]
    n = int(y_u.shape[0])
    q5, q50, q95 = np.percentile(q_u, [5.0, 50.0, 95.0])
    span = float((q95 - q5) / q50) if q50 > 0 else math.nan
    common.update(
        samples=n,
        flow_min_m3s=float(q_u.min()),
        flow_max_m3s=float(q_u.max()),
        flow_span=span,
    )
    if n < min_samples:
        return _result(
            status="too_few_samples",
            message=f"{n} usable samples, fewer than the {min_samples} needed",
            **common,
        )
    sw = np.sqrt(w_u / float(np.mean(w_u)))  # mean weight 1: residuals stay in Pa
    wn = sw * sw
    common.update(
        mean_flow_m3s=float(np.sum(wn * q_u) / np.sum(wn)),
        sum_w=float(np.sum(wn)),
        sum_x=float(np.sum(wn * x_u)),
        sum_y=float(np.sum(wn * y_u)),
        sum_xx=float(np.sum(wn * x_u * x_u)),
        sum_xy=float(np.sum(wn * x_u * y_u)),
        sum_yy=float(np.sum(wn * y_u * y_u)),
    )

    def t_quantile(dof: int) -> float:
        return float(stats.t.ppf(0.5 + confidence / 2.0, max(dof, 1)))

    corr = math.nan
    reasons: list[str] = []
    if fit_static:
        a = np.column_stack([x_u * sw, sw])
        two = _irls(a, y_u * sw, loss)
        common["residual_autocorr"] = _lag1(two.psi)
        cov2, dof2 = _serial_cov(a, two, blocks) if serial else (two.cov, n - 2)
        tq = t_quantile(dof2)
        var_r, var_s = float(cov2[0, 0]), float(cov2[1, 1])
        v_r0, v_s0 = float(two.cov[0, 0]), float(two.cov[1, 1])
        if v_r0 > 0 and v_s0 > 0:
            # The correlation of the estimates from the design (Huber's covariance): the
            # block estimate of it is too noisy to judge identifiability by.
            corr = float(two.cov[0, 1] / math.sqrt(v_r0 * v_s0))
        else:
            # Exact data: the correlation is set by the design matrix alone.
            xm, xs = float(np.mean(x_u * sw**2)), float(np.mean((x_u * sw) ** 2))
            corr = -xm / math.sqrt(xs) if xs > 0 else math.nan
        r2, s2 = float(two.beta[0]), float(two.beta[1])
        hw_r = tq * math.sqrt(max(var_r, 0.0))
        if not math.isfinite(corr) or abs(corr) > max_corr:
            reasons.append(f"|corr(s, r)| = {abs(corr):.3f} > {max_corr}")
        if not span >= min_flow_span:
            reasons.append(f"relative flow span {span:.2f} < {min_flow_span}")
        if not (r2 > 0 and hw_r <= max_r_rel_halfwidth * r2):
            reasons.append(f"r interval ±{hw_r:.3g} too wide")
        if not reasons:
            hw_s = tq * math.sqrt(max(var_s, 0.0))
            status = "ok" if two.converged else "not_converged"
            return _result(
                r=r2, r_low=r2 - hw_r, r_high=r2 + hw_r,
                s_pa=s2, s_low_pa=s2 - hw_s, s_high_pa=s2 + hw_s,
                identifiable=True, residual_std_pa=two.scale, corr_rs=corr,
                iterations=two.iterations, status=status,
                message=(
                    f"r = {r2:.3f} ± {hw_r:.3f} and back-pressure {s2:.0f} ± {hw_s:.0f} Pa "
                    f"from {n} samples"
                ),
                **common,
            )  # fmt: skip
        why = "; ".join(reasons)
        if static_pa is None:
            return _result(
                identifiable=False, corr_rs=corr, residual_std_pa=two.scale,
                iterations=two.iterations, status="not_identifiable",
                message=(
                    f"back-pressure and resistance cannot be separated ({why}) and no "
                    "back-pressure is configured to fall back to"
                ),
                **common,
            )  # fmt: skip

    assert static_pa is not None
    one = _irls((x_u * sw)[:, None], (y_u - static_pa) * sw, loss)
    r1 = float(one.beta[0])
    common["residual_autocorr"] = _lag1(one.psi)
    a1 = (x_u * sw)[:, None]
    cov1, dof1 = _serial_cov(a1, one, blocks) if serial else (one.cov, n - 1)
    hw1 = t_quantile(dof1) * math.sqrt(max(float(cov1[0, 0]), 0.0))
    if fit_static:
        status = "not_identifiable"
        message = (
            f"back-pressure and resistance cannot be separated ({'; '.join(reasons)}): "
            f"back-pressure fixed at the configured {static_pa:.0f} Pa, r = {r1:.3f}"
        )
    else:
        status = "ok" if one.converged else "not_converged"
        message = f"r = {r1:.3f} ± {hw1:.3f} from {n} samples"
    if not (r1 > 0.0):
        message += " (non-positive ratio: check the model and the data)"
    return _result(
        r=r1, r_low=r1 - hw1, r_high=r1 + hw1, s_fixed_pa=float(static_pa),
        identifiable=not fit_static, residual_std_pa=one.scale, corr_rs=corr,
        iterations=one.iterations, status=status, message=message, **common,
    )  # fmt: skip
