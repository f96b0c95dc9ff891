"""The baseline segment: the reference level the replay's detectors compare against.

A segment runs from the start of a branch's history, or from a maintenance event that
starts a new baseline, to the next such event. Its `Baseline` is taken from its first
good windows (or the commissioning period); `offset_comparison` tells, on one window,
whether a departure from the baseline model reads as a constant offset (back-pressure) or
as an offset ∝ Q² (resistance).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from monitor.analysis.findings import DiagnosisSettings
from monitor.analysis.trend import median, robust_sigma

__all__ = ["Baseline", "Segment", "baseline_of", "offset_comparison"]


@dataclass(frozen=True)
class Baseline:
    """The reference state of a segment (medians of its baseline windows)."""

    r0: float  # resistance ratio [-]
    sigma_r: float  # its day-to-day scatter [-]
    s_b: float  # static pressure of the baseline model [Pa]
    pe: float  # logged termination pressure [Pa] (NaN: not logged)
    sigma_pe: float  # its scatter [Pa]
    s: float  # fitted static pressure [Pa] (NaN: not identifiable)
    sigma_s: float  # its scatter [Pa]
    sse_per_sample: float  # residual of the best one-parameter fit of a window [Pa²]
    offset0: float  # static offset of the baseline windows against the baseline [Pa]
    sigma_offset: float  # its day-to-day scatter [Pa]


@dataclass
class Segment:
    """The windows since the last new baseline, and the baseline once it is taken.

    ``level`` and ``trend`` start again after every change found (`restart`); the
    baseline and the usable windows only with a new segment.
    """

    base: Baseline | None = None
    base_idx: list[int] = field(default_factory=list)  # the baseline's windows
    usable: list[int] = field(default_factory=list)  # windows with a usable r
    level: list[int] = field(default_factory=list)  # accepted windows predicting the next
    trend: list[int] = field(default_factory=list)  # accepted windows of the fouling trend

    def restart(self, i: int | None = None) -> None:
        """Level and trend start again (at window *i*, or empty)."""
        self.level, self.trend = ([i], [i]) if i is not None else ([], [])


def offset_comparison(
    row: Mapping[str, float], r0: float, s_b: float, cfg: DiagnosisSettings
) -> dict[str, float] | None:
    """Constant offset vs offset ∝ Q² against the baseline ``y = r0·x + s_b`` on one window.

    Log-likelihood ratio ``(n_eff/2)·ln(SSE_resistance/SSE_static)``: positive favours a
    back-pressure change. ``n_eff`` caps the sample count because a window's samples are
    serially correlated.
    """
    def known(c: str) -> bool:
        return math.isfinite(row.get(c, math.nan))

    sums = ("sum_w", "sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy")
    if all(known(c) for c in sums) and row["sum_w"] > 0:
        w, sx, sy, sxx, sxy, syy = (float(row[c]) for c in sums)
        sd = sy - r0 * sx - w * s_b
        sdd = syy + r0 * r0 * sxx + w * s_b * s_b - 2 * r0 * sxy - 2 * s_b * sy + 2 * r0 * s_b * sx
        sse_s = max(sdd - sd * sd / w, 0.0)
        sxys = sxy - s_b * sx
        syys = syy - 2 * s_b * sy + w * s_b * s_b
        sse_r = max(syys - sxys * sxys / sxx, 0.0) if sxx > 0 else math.nan
        offset, ratio = sd / w, (sxys / sxx if sxx > 0 else math.nan)
        n = float(row["samples"]) if known("samples") else w
    elif known("bp_sse_static") and known("bp_sse_resistance"):
        sse_s, sse_r = float(row["bp_sse_static"]), float(row["bp_sse_resistance"])
        offset = ratio = math.nan
        n = float(row["samples"]) if known("samples") else 2
    else:
        return None
    if not (math.isfinite(sse_s) and math.isfinite(sse_r)):
        return None
    tiny = 1e-30 + 1e-12 * max(sse_s, sse_r)
    n_eff = min(n, float(cfg.max_effective_samples))
    llr = 0.5 * n_eff * math.log((sse_r + tiny) / (sse_s + tiny))
    return {"offset_llr": llr, "samples": n, "static_offset_pa": offset,
            "ratio_if_resistance": ratio, "sse_static": sse_s, "sse_resistance": sse_r}  # fmt: skip


def baseline_of(
    idx: NDArray[np.intp], r: NDArray[np.float64], col: Mapping[str, NDArray[np.float64]],
    ident: NDArray[np.bool_], numbers: Callable[[int], dict[str, float]],
    cfg: DiagnosisSettings,
) -> Baseline:  # fmt: skip
    """The baseline of windows *idx*: r [-], the numeric columns *col* and whether each
    window's back-pressure was identifiable *ident*, in row order; *numbers* gives one
    window's numeric columns."""
    rb = r[idx]
    r0 = float(median(rb))
    sig = max(robust_sigma(rb), cfg.min_sigma_r * r0)
    pe = col["end_pressure_pa"][idx]
    s = col["s_pa"][idx][ident[idx]]
    s_fixed = col["s_fixed_pa"][idx]
    s_b = (
        float(median(s)) if np.isfinite(s).sum() >= 3
        else float(np.nanmedian(s_fixed)) if np.isfinite(s_fixed).any() else 0.0
    )  # fmt: skip
    per, offsets = [], []
    for j in idx:
        cmp = offset_comparison(numbers(int(j)), r0, s_b, cfg)
        if cmp is not None and cmp["samples"] > 0:
            per.append(min(cmp["sse_static"], cmp["sse_resistance"]) / cmp["samples"])
            offsets.append(cmp["static_offset_pa"])
    nan = math.nan
    return Baseline(
        r0=r0, sigma_r=sig, s_b=s_b,
        pe=float(np.nanmedian(pe)) if np.isfinite(pe).any() else nan,
        sigma_pe=max(robust_sigma(pe), cfg.min_sigma_pa),
        s=float(median(s)) if np.isfinite(s).sum() >= 3 else nan,
        sigma_s=max(robust_sigma(s), cfg.min_sigma_pa),
        sse_per_sample=float(median(per)) if per else nan,
        offset0=float(np.nanmedian(offsets)) if np.isfinite(offsets).any() else nan,
        sigma_offset=max(robust_sigma(offsets), cfg.min_sigma_pa),
    )  # fmt: skip
