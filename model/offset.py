"""Back-pressure or resistance: one window's departure from a baseline, tested both ways.

`offset_hypotheses` takes a baseline ``(r_b, s_b)`` and the arrays ``y``, ``x`` of
`model.robust.fit_ratio`, and compares a constant offset (the static back-pressure
changed: ``y − r_b·x − s_b = c``) with a change of resistance (``y − s_b = r'·x``, an
offset growing with Q²). Each hypothesis is a one-parameter weighted least-squares fit;
their residuals decide (`OffsetComparison`). Building ``y`` and ``x`` from a branch
model is `model.fit.compare_offset_hypotheses`'s job.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from model.robust import as_1d

__all__ = ["OffsetComparison", "offset_hypotheses"]


@dataclass(frozen=True)
class OffsetComparison:
    """Constant offset (back-pressure) against resistance change on one window.

    Both hypotheses start from the baseline model ``y = r_b·x + s_b`` and have one free
    parameter each, so their weighted sums of squared residuals compare directly.

    Attributes
    ----------
    samples : samples used.
    static_offset_pa : fitted ``c`` in ``y − r_b·x − s_b = c`` [Pa] (back-pressure change).
    ratio_if_resistance : fitted ``r'`` in ``y − s_b = r'·x`` [-].
    bp_sse_static, bp_sse_resistance : weighted SSE of each hypothesis [Pa²].
    bp_sse_baseline : weighted SSE of the unchanged baseline [Pa²].
    log_evidence : ``(n/2)·ln(SSE_resistance/SSE_static)`` [-]: the log-likelihood ratio
        for Gaussian residuals; positive favours "static". Serially correlated samples
        overstate it; compare with a generous threshold.
    preferred : ``"static"``, ``"resistance"``, ``"undecided"`` (|log_evidence| below the
        threshold) or ``"none"`` (no usable data).
    flow_min_m3s, flow_max_m3s, flow_span : flow range covered [m^3/s], [-].
    message : one plain sentence.
    """

    samples: int
    static_offset_pa: float
    ratio_if_resistance: float
    bp_sse_static: float
    bp_sse_resistance: float
    bp_sse_baseline: float
    log_evidence: float
    preferred: str
    flow_min_m3s: float
    flow_max_m3s: float
    flow_span: float
    message: str


def offset_hypotheses(
    y: ArrayLike,
    x: ArrayLike,
    *,
    r_baseline: float,
    s_baseline_pa: float,
    flow: ArrayLike | None = None,
    weights: ArrayLike | None = None,
    min_samples: int = 10,
    evidence_threshold: float = 5.0,
) -> OffsetComparison:
    """Compare "constant offset" with "resistance change" on arrays.

    Parameters
    ----------
    y, x, flow, weights : as in `fit_ratio` [Pa], [Pa], [m^3/s], [-]
    r_baseline : baseline resistance ratio [-]
    s_baseline_pa : baseline back-pressure in the same sense as ``FitResult.s_pa`` [Pa]
    min_samples : fewest samples to decide [-]
    evidence_threshold : |log_evidence| needed to prefer one hypothesis [-]; 5 is a
        likelihood ratio of e⁵ ≈ 150 (2·ln B = 10, "very strong" on the Kass & Raftery
        1995 scale)

    Returns
    -------
    OffsetComparison

    Examples
    --------
    >>> q = np.linspace(0.02, 0.05, 60)
    >>> x = 4.0e7 * q**2
    >>> res = offset_hypotheses(x + 1.0e4 + 3.0e4, x, r_baseline=1.0, s_baseline_pa=1.0e4)
    >>> res.preferred, round(res.static_offset_pa)
    ('static', 30000)
    """
    if not (math.isfinite(r_baseline) and math.isfinite(s_baseline_pa)):
        raise ValueError("r_baseline and s_baseline_pa must be finite numbers")
    y_arr = as_1d("y", y)
    n_all = y_arr.shape[0]
    x_arr = as_1d("x", x, n_all)
    w_arr = np.ones(n_all) if weights is None else as_1d("weights", weights, n_all)
    q_arr = np.sqrt(np.clip(x_arr, 0.0, None)) if flow is None else as_1d("flow", flow, n_all)
    use = np.isfinite(y_arr) & np.isfinite(x_arr) & np.isfinite(w_arr) & np.isfinite(q_arr)
    use &= (w_arr > 0.0) & (x_arr > 0.0)
    n = int(use.sum())
    nan = math.nan
    if n < max(min_samples, 2):
        return OffsetComparison(
            n, nan, nan, nan, nan, nan, nan, "none", nan, nan, nan,
            f"{n} usable samples, fewer than the {min_samples} needed",
        )  # fmt: skip
    yb, xb, wb, qb = y_arr[use], x_arr[use], w_arr[use] / float(np.mean(w_arr[use])), q_arr[use]
    d = yb - r_baseline * xb - s_baseline_pa
    # Closed-form weighted LS for each one-parameter hypothesis: screening has already
    # removed spikes, and a robust loss would make the two SSEs incomparable.
    c = float(np.sum(wb * d) / np.sum(wb))
    ys = yb - s_baseline_pa
    r_prime = float(np.sum(wb * xb * ys) / np.sum(wb * xb * xb))
    sse_static = float(np.sum(wb * (d - c) ** 2))
    sse_res = float(np.sum(wb * (ys - r_prime * xb) ** 2))
    sse_base = float(np.sum(wb * d**2))
    tiny = 1e-300
    evidence = 0.5 * n * math.log(max(sse_res, tiny) / max(sse_static, tiny))
    if evidence > evidence_threshold:
        preferred = "static"
        msg = f"the departure looks like a back-pressure change of {c:.0f} Pa"
    elif evidence < -evidence_threshold:
        preferred = "resistance"
        msg = f"the departure looks like a resistance change to r = {r_prime:.3f}"
    else:
        preferred = "undecided"
        msg = "the window cannot tell a back-pressure change from a resistance change"
    q5, q50, q95 = np.percentile(qb, [5.0, 50.0, 95.0])
    return OffsetComparison(
        samples=n, static_offset_pa=c, ratio_if_resistance=r_prime,
        bp_sse_static=sse_static, bp_sse_resistance=sse_res, bp_sse_baseline=sse_base,
        log_evidence=evidence, preferred=preferred, flow_min_m3s=float(qb.min()),
        flow_max_m3s=float(qb.max()), flow_span=float((q95 - q5) / q50) if q50 > 0 else nan,
        message=msg,
    )  # fmt: skip
