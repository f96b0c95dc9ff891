"""The per-sample checks of the screening, tag by tag on sorted arrays: spikes (the
Hampel identifier, its scale floored at the tag's noise and resolution), the noise and
resolution estimated from the data, changes faster than plausible, frozen runs and the
gaps between samples. Pure numpy/pandas, no I/O; `monitor.analysis.quality.screen` combines them
into its flags.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

if TYPE_CHECKING:
    from monitor.analysis.quality import TagLimits

__all__ = ["HAMPEL_WINDOW", "MAD_TO_SIGMA", "resolution_by_tag"]


HAMPEL_WINDOW = 7  # samples, centred (Hampel 1974)
MAD_TO_SIGMA = 1.4826  # 1/Φ⁻¹(3/4): MAD of a normal sample → its standard deviation


def _rolling_median(windows: np.ndarray) -> np.ndarray:
    """Row medians ignoring NaN, vectorised (sorting puts NaN last)."""
    ordered = np.sort(windows, axis=1)
    count = np.sum(~np.isnan(windows), axis=1)
    rows = np.arange(len(windows))
    lo = np.clip((count - 1) // 2, 0, None)
    hi = np.clip(count // 2, 0, None)
    med = 0.5 * (ordered[rows, lo] + ordered[rows, hi])
    return np.where(count > 0, med, np.nan)


def hampel_outliers(
    values: np.ndarray, codes: np.ndarray, noise: np.ndarray, noise_rel: np.ndarray, k: float
) -> np.ndarray:
    """Hampel identifier over each tag's samples; windows never cross tags."""
    n = len(values)
    if n == 0:
        return np.zeros(0, dtype=bool)
    half = HAMPEL_WINDOW // 2
    padded = np.pad(values, half, constant_values=np.nan)
    padded_codes = np.pad(codes, half, constant_values=-1)
    # A window of identical values has MAD 0, and the MAD of 7 noisy samples is often
    # far below the true scatter: Hampel's rule alone flags a few % of plain Gaussian
    # noise. Flooring the scale at the tag's noise (configured, and estimated from the
    # whole window) brings that down to the 3-sigma rate (0.27 %).
    # A coarse transmitter (readings on a few levels) steps by whole resolution steps:
    # the floor is at least one step, so a move to a neighbouring level is never a spike.
    base_floor = np.maximum.reduce(
        [noise, _noise_estimate(values, codes), _resolution(values, codes)]
    )
    # The median lies between the window's least and greatest value, so a sample within
    # k·floor of all of them cannot be flagged: medians (two sorts per window) are taken
    # only for the rest — most samples of a quiet signal are settled by this bound. The
    # bound may take in neighbours of another tag (they only widen it) and skips missing
    # values (the median does too); a missing sample itself always goes the full way.
    low, high = values.copy(), values.copy()
    for j in range(HAMPEL_WINDOW):
        if j != half:
            np.fmin(low, padded[j : j + n], out=low)
            np.fmax(high, padded[j : j + n], out=high)
    with np.errstate(invalid="ignore"):
        maybe = ~(np.maximum(values - low, high - values) <= k * base_floor)
    out = np.zeros(n, dtype=bool)
    idx = np.flatnonzero(maybe)
    if len(idx) == 0:
        return out
    win = np.lib.stride_tricks.sliding_window_view(padded, HAMPEL_WINDOW)[idx]  # a copy
    win_codes = np.lib.stride_tricks.sliding_window_view(padded_codes, HAMPEL_WINDOW)[idx]
    x = values[idx]
    win[win_codes != codes[idx, None]] = np.nan
    med = _rolling_median(win)
    mad = _rolling_median(np.abs(win - med[:, None]))
    floor = np.maximum(base_floor[idx], noise_rel[idx] * np.abs(med))
    scale = np.maximum(MAD_TO_SIGMA * mad, floor)
    enough = np.sum(~np.isnan(win), axis=1) > half  # a majority of the window is known
    with np.errstate(invalid="ignore"):
        out[idx] = enough & (np.abs(x - med) > k * scale)
    return out


def _noise_estimate(values: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """Per sample, its tag's noise σ estimated robustly from successive differences.

    For white noise of σ, |Δx| has median 0.6745·√2·σ, so σ ≈ 1.4826·median|Δx|/√2;
    steps and spikes barely move a median, slow process changes add little at historian
    rates. NaN samples are skipped.
    """
    out = np.zeros(int(codes.max()) + 1 if len(codes) else 0)
    idx = np.flatnonzero(np.isfinite(values))
    if len(idx) >= 2:
        same = codes[idx[1:]] == codes[idx[:-1]]
        diffs = pd.Series(np.abs(np.diff(values[idx]))[same])
        med = diffs.groupby(codes[idx[1:]][same]).median()
        out[med.index.to_numpy()] = MAD_TO_SIGMA * med.to_numpy() / np.sqrt(2.0)
    return out[codes]


def _resolution(values: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """Per sample, its tag's resolution estimated from the data [SI] (0 when it has none).

    A tag is quantised when at least 90 % of its samples sit on values that occur 3 times
    or more (its levels) and it has two levels or more; its resolution is then the median
    gap between neighbouring levels. A coarse gauge or a low-resolution analog input
    gives its level spacing; a signal that resolves its noise has few repeated values
    and gets 0, as does a steady value with a lone outlier (one level). NaN samples are
    skipped. (Thresholds of this project, not a published rule.)
    """
    n_tags = int(codes.max()) + 1 if len(codes) else 0
    out = np.zeros(n_tags)
    idx = np.flatnonzero(np.isfinite(values))
    if len(idx) < 2:
        return out[codes]
    order = idx[np.lexsort((values[idx], codes[idx]))]
    v, c = values[order], codes[order]
    start = np.r_[True, (c[1:] != c[:-1]) | (v[1:] != v[:-1])]
    first = np.flatnonzero(start)
    count = np.diff(np.r_[first, len(v)])
    level = count >= 3
    run_code, run_value = c[first], v[first]
    total = np.bincount(c, minlength=n_tags)
    on_levels = np.bincount(run_code[level], weights=count[level], minlength=n_tags)
    lv_code, lv_value = run_code[level], run_value[level]
    same = lv_code[1:] == lv_code[:-1]
    if same.any():
        gaps = pd.Series(np.diff(lv_value)[same]).groupby(lv_code[1:][same]).median()
        tags = gaps.index.to_numpy()
        quantised = on_levels[tags] >= 0.9 * total[tags]
        out[tags[quantised]] = gaps.to_numpy()[quantised]
    return out[codes]


def resolution_by_tag(flags: pd.DataFrame) -> dict[str, float]:
    """Each tag's resolution estimated from its usable samples [SI] (see `_resolution`);
    *flags* as in `ScreenResult.flags`."""
    use = flags[flags["usable"].to_numpy(bool)] if "usable" in flags else flags
    if use.empty:
        return {}
    codes, tags = pd.factorize(use["tag"])
    res = _resolution(use["value"].to_numpy("float64"), codes)
    first = np.unique(codes, return_index=True)[1]
    return {str(tags[c]): float(res[i]) for c, i in zip(codes[first], first, strict=True)}


def too_fast(
    values: np.ndarray,
    t_s: np.ndarray,
    codes: np.ndarray,
    accepted: np.ndarray,
    max_rate: np.ndarray,
) -> np.ndarray:
    """Change from the previous accepted sample of the same tag faster than *max_rate*."""
    out = np.zeros(len(values), dtype=bool)
    idx = np.flatnonzero(accepted)
    if len(idx) < 2:
        return out
    same = codes[idx[1:]] == codes[idx[:-1]]
    dt = t_s[idx[1:]] - t_s[idx[:-1]]
    dv = np.abs(values[idx[1:]] - values[idx[:-1]])
    with np.errstate(divide="ignore", invalid="ignore"):
        fast = same & (dt > 0) & (dv / np.where(dt > 0, dt, 1.0) > max_rate[idx[1:]])
    out[idx[1:][fast]] = True
    return out


def frozen_runs(
    values: np.ndarray,
    t_s: np.ndarray,
    codes: np.ndarray,
    valid: np.ndarray,
    tol: np.ndarray,
    noise: np.ndarray,
    is_flow: np.ndarray,
    frozen_s: float,
) -> np.ndarray:
    """Runs of valid samples spanning at most *tol* for at least *frozen_s*.

    A flow meter resting at zero (within its noise) is not frozen: no flow is a state
    the pump-off screening deals with.
    """
    idx = np.flatnonzero(valid)
    out = np.zeros(len(values), dtype=bool)
    if len(idx) < 2:
        return out
    v, t, c = values[idx], t_s[idx], codes[idx]
    breaks = np.r_[True, (c[1:] != c[:-1]) | (np.abs(np.diff(v)) > tol[idx][1:])]
    # Runs are contiguous: their extremes by reduceat over the run starts.
    starts = np.flatnonzero(breaks)
    run = np.cumsum(breaks) - 1
    span = (np.maximum.reduceat(v, starts) - np.minimum.reduceat(v, starts))[run]
    duration = (np.maximum.reduceat(t, starts) - np.minimum.reduceat(t, starts))[run]
    at_rest = is_flow[idx] & (np.abs(v) <= noise[idx])
    out[idx] = (duration >= frozen_s) & (span <= tol[idx]) & ~at_rest
    return out


def find_gaps(
    frame: pd.DataFrame,
    codes: np.ndarray,
    tags: pd.Index,
    t_s: np.ndarray,
    new_run: np.ndarray,
    max_gap_s: float,
    start: pd.Timestamp | None,
    end: pd.Timestamp | None,
    specs: Mapping[str, TagLimits],
) -> pd.DataFrame:
    """Gaps between samples of each tag, and at the edges of [start, end) when given."""
    times = frame["time"]
    rows: list[tuple[str, pd.Timestamp, pd.Timestamp]] = []
    inner = np.flatnonzero(~new_run & (np.r_[np.inf, np.diff(t_s)] > max_gap_s))
    rows += [(tags[codes[i]], times.iloc[i - 1], times.iloc[i]) for i in inner]
    first = np.flatnonzero(new_run)
    last = np.r_[first[1:] - 1, len(frame) - 1] if len(first) else first
    if start is not None:
        start = pd.Timestamp(start).tz_convert("UTC")
        rows += [
            (tags[codes[i]], start, times.iloc[i])
            for i in first
            if (times.iloc[i] - start).total_seconds() > max_gap_s
        ]
    if end is not None:
        end = pd.Timestamp(end).tz_convert("UTC")
        rows += [
            (tags[codes[i]], times.iloc[i], end)
            for i in last
            if (end - times.iloc[i]).total_seconds() > max_gap_s
        ]
    if start is not None and end is not None:
        seen = set(tags)
        rows += [(tag, start, end) for tag in specs if tag not in seen]
    gaps = pd.DataFrame(rows, columns=["tag", "start", "end"])
    gaps["tag"] = gaps["tag"].astype(object)
    for col in ("start", "end"):
        gaps[col] = pd.to_datetime(gaps[col], utc=True).dt.as_unit("ns")
    gaps["duration_s"] = (gaps["end"] - gaps["start"]).dt.total_seconds()
    return gaps.sort_values(["tag", "start"]).reset_index(drop=True)
