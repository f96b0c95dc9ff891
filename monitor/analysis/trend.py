"""Statistics for drift detection on a series of fitted values (one value per window).

All functions are pure, work on numpy arrays, and return frozen dataclasses.

* `theil_sen` — robust slope (Sen 1968) with its confidence interval (scipy).
* `mann_kendall` — Mann–Kendall trend test (Mann 1945; Kendall 1975) with the
  Hamed & Rao (1998) variance correction for serially correlated data.
* `cusum` — Page's (1954) tabular CUSUM, one-sided upper and lower, with the estimated
  change point (the last window the statistic stood at zero).
* `mean_shift` — the least-squares single change point in the mean.
* `crossing_forecast` — when a linear trend reaches a limit, with an interval.
"""

from __future__ import annotations

import functools
import logging
import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

__all__ = [
    "Crossing",
    "Cusum",
    "MannKendall",
    "MeanShift",
    "TheilSen",
    "crossing_forecast",
    "cusum",
    "mann_kendall",
    "mean_shift",
    "median",
    "robust_sigma",
    "sen_slope",
    "theil_sen",
]

logger = logging.getLogger(__name__)


def _as_1d(name: str, values: ArrayLike) -> NDArray[np.float64]:
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite (drop NaN windows before calling)")
    return arr


@dataclass(frozen=True)
class TheilSen:
    """Theil–Sen line ``y ≈ intercept + slope·t``.

    ``slope_low``/``slope_high`` bound the slope at ``confidence`` (the distribution-free
    interval of Sen 1968, which assumes independent residuals).
    """

    slope: float
    intercept: float
    slope_low: float
    slope_high: float
    confidence: float
    n: int


def theil_sen(t: ArrayLike, y: ArrayLike, *, confidence: float = 0.95) -> TheilSen:
    """Robust line through ``(t, y)`` by the median of pairwise slopes.

    Parameters
    ----------
    t : abscissa, e.g. days since an origin [d]
    y : values, e.g. resistance ratio [-]
    confidence : two-sided confidence of the slope interval [-]

    >>> fit = theil_sen([0, 1, 2, 3, 4], [1.0, 1.1, 1.2, 1.3, 1.4])
    >>> round(fit.slope, 6), round(fit.intercept, 6)
    (0.1, 1.0)
    """
    tt = _as_1d("t", t)
    yy = _as_1d("y", y)
    if tt.size != yy.size:
        raise ValueError(f"t and y must have the same length, got {tt.size} and {yy.size}")
    if tt.size < 3:
        raise ValueError(f"y needs at least 3 values, got {yy.size}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be in (0, 1), got {confidence}")
    res = stats.theilslopes(yy, tt, alpha=confidence)
    return TheilSen(
        slope=float(res.slope),
        intercept=float(res.intercept),
        slope_low=float(res.low_slope),
        slope_high=float(res.high_slope),
        confidence=confidence,
        n=int(tt.size),
    )


@functools.lru_cache(maxsize=64)
def _pairs(n: int) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    i, j = np.triu_indices(n, 1)
    return i, j


def median(values: ArrayLike) -> float:
    """Median of a short series, as `numpy.median` (NaN if any value is NaN or none).

    A sort and two look-ups: several times faster than `numpy.median` on the tens of
    values the diagnosis takes medians of thousands of times per run.

    >>> median([3.0, 1.0, 2.0, 10.0]), median([]), median([1.0, float("nan")])
    (2.5, nan, nan)
    """
    v = np.sort(np.asarray(values, dtype=float), axis=None)
    n = v.size
    if n == 0 or math.isnan(v[-1]):
        return math.nan
    return 0.5 * (float(v[(n - 1) // 2]) + float(v[n // 2]))


def sen_slope(t: ArrayLike, y: ArrayLike) -> tuple[float, float]:
    """Theil–Sen slope and intercept only (no interval): a fast path for short series.

    Same estimator as `theil_sen`: slope = median of pairwise slopes, intercept =
    median(y) − slope·median(t) (the convention of scipy.stats.theilslopes).

    Parameters
    ----------
    t : abscissa [d]
    y : values [unit]

    Returns
    -------
    (slope [unit/d], intercept [unit])

    >>> slope, intercept = sen_slope([0.0, 1.0, 2.0, 3.0], [1.0, 1.2, 1.4, 1.6])
    >>> round(slope, 9), round(intercept, 9)
    (0.2, 1.0)
    """
    tt = np.asarray(t, dtype=float)
    yy = np.asarray(y, dtype=float)
    if tt.shape != yy.shape or tt.ndim != 1 or tt.size < 2:
        raise ValueError("t and y must be 1-D arrays of the same length >= 2")
    i, j = _pairs(tt.size)
    dt = tt[j] - tt[i]
    ok = dt != 0
    if not ok.any():
        raise ValueError("t must hold at least two distinct values")
    slope = median((yy[j] - yy[i])[ok] / dt[ok])
    return slope, median(yy) - slope * median(tt)


def robust_sigma(values: ArrayLike) -> float:
    """Scatter of a short series [unit of values].

    The larger of 1.4826·MAD of the levels and 1.4826·MAD of successive differences / √2:
    the first is not fooled by smooth (positively correlated) series, the second not by
    a slow drift. NaNs are ignored; fewer than 3 values give 0.

    >>> round(robust_sigma([1.0, 1.1, 0.9, 1.0, 1.1, 0.9]), 4)
    0.1483
    """
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size < 3:
        return 0.0
    mad = 1.4826 * median(np.abs(v - median(v)))
    dmad = 1.4826 * median(np.abs(np.diff(v))) / math.sqrt(2.0)
    return max(mad, dmad)


_Z_975 = 1.959963984540054  # standard normal 97.5 % quantile


@dataclass(frozen=True)
class MannKendall:
    """Mann–Kendall trend test result.

    ``s`` is Kendall's score Σ sign(y_j − y_i) over i < j; ``var_s`` its variance under
    independence (with the tie correction); ``correction`` the Hamed–Rao factor n/n*
    (1.0 when not applied); ``z`` uses the corrected variance and the usual continuity
    correction; ``p`` is two-sided; ``tau`` = s / (n(n−1)/2).
    """

    s: float
    var_s: float
    correction: float
    z: float
    p: float
    tau: float
    n: int


def _mk_score(y: NDArray[np.float64]) -> float:
    # Σ_{i<j} sign(y_j − y_i): one triangular sign matrix, O(n²) memory is fine for the
    # few hundred windows of a branch history.
    diff = y[None, :] - y[:, None]
    return float(np.sign(diff[np.triu_indices(y.size, 1)]).sum())


def _mk_variance(y: NDArray[np.float64]) -> float:
    n = y.size
    _, counts = np.unique(y, return_counts=True)
    ties = counts[counts > 1].astype(float)
    return float((n * (n - 1) * (2 * n + 5) - np.sum(ties * (ties - 1) * (2 * ties + 5))) / 18.0)


def _acf(x: NDArray[np.float64], max_lag: int) -> NDArray[np.float64]:
    # Biased sample autocorrelation (divisor n), the estimator Hamed & Rao use.
    d = x - x.mean()
    denom = float(np.dot(d, d))
    n = d.size
    full = np.correlate(d, d, mode="full")[n - 1 : n + max_lag]
    return np.asarray(full / denom if denom > 0 else np.zeros(max_lag + 1), dtype=float)


def mann_kendall(
    y: ArrayLike,
    *,
    hamed_rao: bool = True,
    max_lag: int | None = None,
    acf_alpha: float = 0.05,
) -> MannKendall:
    """Mann–Kendall test for a monotonic trend in equally spaced ``y``.

    With ``hamed_rao`` the variance of S is multiplied by n/n* (Hamed & Rao 1998, eq. 18):

        n/n* = 1 + 2/(n(n−1)(n−2)) · Σ_k (n−k)(n−k−1)(n−k−2)·ρ_k

    where ρ_k is the autocorrelation of the ranks of the series after removing the
    Theil–Sen trend, summed over the lags whose ρ_k is significant at ``acf_alpha``
    (|ρ_k| > z_{1−α/2}/√n) up to ``max_lag`` (default n−1). The factor is floored at
    1/n so the variance stays positive with strongly negative correlation.

    Parameters
    ----------
    y : equally spaced values [any unit]
    hamed_rao : apply the autocorrelation correction [-]
    max_lag : largest lag considered in the correction [windows]
    acf_alpha : significance level of the lag screening [-]

    >>> r = mann_kendall([1.0, 2.0, 3.0, 4.0, 5.0], hamed_rao=False)
    >>> r.s, r.var_s, round(r.tau, 3)
    (10.0, 16.666666666666668, 1.0)
    """
    yy = _as_1d("y", y)
    n = yy.size
    if n < 4:
        raise ValueError(f"y needs at least 4 values for a trend test, got {n}")
    if not 0.0 < acf_alpha < 1.0:
        raise ValueError(f"acf_alpha must be in (0, 1), got {acf_alpha}")
    s = _mk_score(yy)
    var_s = _mk_variance(yy)
    correction = 1.0
    if hamed_rao:
        lag = n - 1 if max_lag is None else max(1, min(int(max_lag), n - 1))
        tt = np.arange(n, dtype=float)
        slope, _ = sen_slope(tt, yy)
        ranks = stats.rankdata(yy - slope * tt)
        rho = _acf(ranks, lag)
        k = np.arange(1, lag + 1)
        zq = _Z_975 if acf_alpha == 0.05 else float(stats.norm.ppf(1.0 - acf_alpha / 2.0))
        bound = zq / math.sqrt(n)
        sig = np.abs(rho[1:]) > bound
        weights = (n - k) * (n - k - 1) * (n - k - 2)
        total = float(np.sum(weights[sig] * rho[1:][sig]))
        correction = max(1.0 + 2.0 * total / (n * (n - 1) * (n - 2)), 1.0 / n)
    var_corr = var_s * correction
    if var_corr <= 0:
        z = 0.0
    elif s > 0:
        z = (s - 1.0) / math.sqrt(var_corr)
    elif s < 0:
        z = (s + 1.0) / math.sqrt(var_corr)
    else:
        z = 0.0
    p = math.erfc(abs(z) / math.sqrt(2.0))  # two-sided normal p-value
    return MannKendall(
        s=s,
        var_s=var_s,
        correction=correction,
        z=float(z),
        p=p,
        tau=s / (0.5 * n * (n - 1)),
        n=n,
    )


@dataclass(frozen=True)
class Cusum:
    """Tabular CUSUM on standardised values ``z = (x − target)/sigma``.

    ``upper``/``lower`` are C⁺ and C⁻ per point (both ≥ 0); ``alarm`` the index of the
    first point with C⁺ > h or C⁻ > h (None when none); ``change`` the estimated change
    point: the index after the last point the alarming side stood at zero (Montgomery's
    N⁺ rule); ``direction`` +1 for an upward shift, −1 downward, 0 for no alarm.
    """

    upper: NDArray[np.float64]
    lower: NDArray[np.float64]
    alarm: int | None
    change: int | None
    direction: int


def cusum(x: ArrayLike, *, target: float, sigma: float, k: float = 0.5, h: float = 5.0) -> Cusum:
    """Page's (1954) tabular CUSUM.

        C⁺_i = max(0, z_i − k + C⁺_{i−1}),   C⁻_i = max(0, −z_i − k + C⁻_{i−1})

    Parameters
    ----------
    x : observations [any unit]
    target : in-control mean [unit of x]
    sigma : in-control standard deviation [unit of x]
    k : reference value in σ units, half the shift to detect [-]
    h : decision interval in σ units [-]

    >>> c = cusum([0, 0, 0, 3, 3, 3], target=0.0, sigma=1.0, k=0.5, h=4.0)
    >>> c.alarm, c.change, c.direction
    (4, 3, 1)
    """
    xx = _as_1d("x", x)
    if not sigma > 0:
        raise ValueError(f"sigma must be positive, got {sigma}")
    if k < 0 or h <= 0:
        raise ValueError(f"k must be >= 0 and h > 0, got k={k}, h={h}")
    z = (xx - target) / sigma
    upper = np.zeros(z.size)
    lower = np.zeros(z.size)
    cu = cl = 0.0
    alarm: int | None = None
    direction = 0
    for i, zi in enumerate(z):
        cu = max(0.0, zi - k + cu)
        cl = max(0.0, -zi - k + cl)
        upper[i] = cu
        lower[i] = cl
        if alarm is None and (cu > h or cl > h):
            alarm = i
            direction = 1 if cu > h else -1
    change: int | None = None
    if alarm is not None:
        side = upper if direction > 0 else lower
        zeros = np.flatnonzero(side[: alarm + 1] == 0.0)
        change = int(zeros[-1]) + 1 if zeros.size else 0
    return Cusum(upper=upper, lower=lower, alarm=alarm, change=change, direction=direction)


@dataclass(frozen=True)
class MeanShift:
    """Single change point in the mean: ``y[:index]`` vs ``y[index:]``.

    ``step`` = mean after − mean before; ``t`` the two-sample t statistic with the pooled
    within-segment scatter ``sigma``.
    """

    index: int
    step: float
    sigma: float
    t: float


def mean_shift(y: ArrayLike, *, min_size: int = 2) -> MeanShift:
    """The split of ``y`` that minimises the within-segment sum of squares.

    Parameters
    ----------
    y : values [any unit]
    min_size : fewest points on each side [-]

    >>> ms = mean_shift([1.0, 1.0, 1.1, 0.9, 2.0, 2.1, 1.9, 2.0])
    >>> ms.index, round(ms.step, 3)
    (4, 1.0)
    """
    yy = _as_1d("y", y)
    n = yy.size
    if min_size < 1 or n < 2 * min_size:
        raise ValueError(f"y needs at least 2*min_size={2 * min_size} values, got {n}")
    c1 = np.cumsum(yy)
    c2 = np.cumsum(yy * yy)
    idx = np.arange(min_size, n - min_size + 1)
    n1 = idx.astype(float)
    n2 = n - n1
    s1 = c1[idx - 1]
    s2 = c1[-1] - s1
    ss = (c2[idx - 1] - s1**2 / n1) + (c2[-1] - c2[idx - 1] - s2**2 / n2)
    best = int(np.argmin(ss))
    i = int(idx[best])
    step = float(s2[best] / n2[best] - s1[best] / n1[best])
    dof = max(n - 2, 1)
    sigma = math.sqrt(max(float(ss[best]), 0.0) / dof)
    se = sigma * math.sqrt(1.0 / n1[best] + 1.0 / n2[best])
    t = step / se if se > 0 else math.copysign(math.inf, step) if step else 0.0
    return MeanShift(index=i, step=step, sigma=sigma, t=float(t))


@dataclass(frozen=True)
class Crossing:
    """When a linear trend reaches a limit.

    Times are in the unit of the trend's abscissa (days in branchwatch), measured from
    ``t_now``. ``eta`` is None when the trend does not rise towards the limit; ``eta_low``
    (earliest) / ``eta_high`` (latest, None = not within the slope interval) bracket it.
    ``reached`` is True when the level at ``t_now`` is already at or above the limit.
    """

    level_now: float
    eta: float | None
    eta_low: float | None
    eta_high: float | None
    reached: bool


def crossing_forecast(fit: TheilSen, *, limit: float, t_now: float) -> Crossing:
    """Time from ``t_now`` until ``fit`` reaches ``limit`` (rising trends only).

    The interval uses the slope interval of the fit (the level at ``t_now`` is held at the
    line's value: with tens of windows its error is small against the slope's).

    Parameters
    ----------
    fit : a Theil–Sen line [unit/d]
    limit : level to reach [unit]
    t_now : present abscissa [d]

    >>> f = TheilSen(slope=0.01, intercept=1.0, slope_low=0.005, slope_high=0.02,
    ...              confidence=0.95, n=30)
    >>> c = crossing_forecast(f, limit=1.5, t_now=20.0)
    >>> round(c.eta, 3), round(c.eta_low, 3), round(c.eta_high, 3)
    (30.0, 15.0, 60.0)
    """
    level = fit.intercept + fit.slope * t_now
    gap = limit - level
    if gap <= 0:
        return Crossing(level_now=level, eta=0.0, eta_low=0.0, eta_high=0.0, reached=True)

    def eta(slope: float) -> float | None:
        return gap / slope if slope > 0 else None

    return Crossing(
        level_now=level,
        eta=eta(fit.slope),
        eta_low=eta(fit.slope_high),
        eta_high=eta(fit.slope_low),
        reached=False,
    )
