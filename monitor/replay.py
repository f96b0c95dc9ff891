"""One branch's fit history replayed window by window: steps, back-pressure, fouling.

`BranchReplay` walks the windows of one branch in time order and decides at each window
with only the data up to it (`monitor.diagnose.diagnose` runs one per branch and adds the
instrument and imbalance findings, which need no replay). A window in which the analysis
found a step part-way through (its ``tail_*`` columns, see `read_tails`) is read as its
tail: the state after the step, dated to the step.

Causes and how they are told apart (DESIGN §3)
----------------------------------------------
* **instrument** — an ``r`` step that the header mass balance shows to be the meter's and
  not the water's. Windows whose screening flagged a tag of the branch are not replayed
  at all (`monitor.diagnose` reports them), so a frozen meter is never called fouling.
* **restriction** — a step up in ``r``: the window's ``r`` stands ``step_z`` σ above the
  level predicted from the recent windows (Theil–Sen extrapolation) and at least
  ``min_step_rel`` above it, and most of that rise came since the last one or two
  accepted windows, far more than the recent slope makes in them (a fouling ramp, however
  fast and however precise the fits, climbs a little every window: never a step); or a
  tabular CUSUM (Page 1954) on those prediction errors passes ``cusum_h`` and a single
  mean shift explains the recent windows better than both a line and "flat, then a line",
  rising within two windows. The window after the candidate confirms it (an outlier fit
  is not a step) and names it, so a step is reported by the end of the first whole window
  after it — or by the end of its own window when that window's tail (the samples after
  a step inside it) shows the new state: a jump of ``at_once_z`` σ and ``at_once_rel``
  on a window with a narrow ``r`` interval that fits one cause cleanly is reported in its
  own window (evidence ``confirmed`` 0, confidence × ``at_once_discount``) and
  confirmed, or ended, by the next.
* **back_pressure** — the logged termination pressure (``end_pressure_pa``) or the fitted
  static pressure (``s_pa`` on identifiable windows) steps; or an ``r`` step whose window
  says "constant offset" rather than "offset ∝ Q²" (the comparison of the two one-parameter
  hypotheses against the baseline model; from per-window sums, see `HISTORY_COLUMNS`);
  or a window whose departure from the baseline is a clear constant offset of at least
  ``min_bp_step_pa`` (a step too small against the scatter of r to show as a jump). A
  window that fits neither hypothesis (a step part-way through it: the comparison is then
  biased by the time of day of the step) defers the decision to the next window.
  A back-pressure change found this way is taken out of the later windows' ``r``.
* **fouling** — a slow rise over trailing look-backs of ``trend_lookbacks`` windows:
  Theil–Sen slope, Mann–Kendall test with the Hamed–Rao correction at ``trend_alpha``,
  a fitted rise of ``min_rise_r`` (relative) and ``min_rise_sigma`` σ, on
  ``trend_persistence`` windows in a row; the onset is the knot of the best "flat, then
  line" fit; the date ``r`` reaches the cleaning limit is forecast with an interval
  (Theil–Sen slope interval widened by the Hamed–Rao factor). Once the recent level
  passes the cleaning limit the finding says on which day, and its evidence ``priority``
  turns high. A fall of ``r`` back into the lower half of the rise, below the limit, for
  ``verify_windows`` usable windows with no maintenance logged is an unlogged cleaning
  (or a removed restriction): the finding ends at the fall, its message says how to
  log it, and a new baseline starts (`_unlogged_fall`).
* **low_flow** — window mean flow below the branch minimum (the near-real-time alarm
  is `monitor.alarms`; this is its daily record). One finding per condition: spells
  that come back within ``clear_after_s`` are episodes of it (`monitor.findings.Episodes`);
  it ends when its last one did, once ``clear_after_s`` has passed without another.
* **imbalance** — not a per-branch matter: `monitor.diagnose`.

Baselines come from the commissioning period of the branch settings, else from the first
``baseline_windows`` good windows after the start of the history or after the last
maintenance event that starts one.

Maintenance is checked against the data (`_settle`): a ``cleaned`` (or ``valve_set``)
event while a fouling or restriction finding is open is judged on the first
``verify_windows`` usable windows after it. When their median ``r`` came back down — for
fouling below the cleaning limit and by at least half of the rise above the baseline;
for a restriction below the middle of its step — the finding ends at the event and a new
baseline starts, as after any other event. When it did not, the finding stays open, its
message says so with the medians of ``r`` before and after, and the replay goes on from
the old baseline as if the event had not been logged. Other events end the findings of
`END_BY_EVENT` and start a new baseline at once.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from monitor.findings import (
    CHECKED_BY_FITS,
    END_BY_EVENT,
    EVENT_WORDS,
    TAIL_COLUMNS,
    BranchSettings,
    DiagnosisSettings,
    Episodes,
    Finding,
    flow_pair,
)
from monitor.trend import (
    TheilSen,
    crossing_forecast,
    mann_kendall,
    mean_shift,
    median,
    robust_sigma,
    sen_slope,
    theil_sen,
)

__all__ = ["BranchReplay", "numeric", "read_tails"]

logger = logging.getLogger(__name__)

# -- per-branch replay -------------------------------------------------------------------

_DAY = pd.Timedelta(days=1)


@dataclass
class _Open:
    kind: str
    start: pd.Timestamp
    detected: pd.Timestamp
    confidence: float
    evidence: dict[str, float]
    message: str
    ref: float = math.nan  # level before the change (for the return to normal)
    step: float = math.nan  # size of the change in the series' unit
    note: str = ""  # what the last maintenance event on it did (added to the message)
    # the numbers of that event's check (kept apart: `_fouling` rewrites the evidence)
    event: dict[str, float] = field(default_factory=dict)
    episodes: Episodes | None = None  # of a condition that comes and goes (low flow)
    limit_passed: pd.Timestamp | None = None  # when a fouled r passed the cleaning limit
    peak: float = math.nan  # highest recent level of r while open (fouling) [-]

    def close(self, branch: str, end: pd.Timestamp | None) -> Finding:
        return Finding(
            branch=branch,
            kind=self.kind,
            start=self.start.to_pydatetime(),
            detected=self.detected.to_pydatetime(),
            end=None if end is None else end.to_pydatetime(),
            confidence=float(min(max(self.confidence, 0.0), 1.0)),
            evidence={k: float(v) for k, v in {**self.evidence, **self.event}.items()},
            message=f"{self.message} {self.note}" if self.note else self.message,
        )


@dataclass
class _Verify:
    """A cleaning or valve setting waiting for the fits after it (see `_settle`)."""

    when: pd.Timestamp
    kind: str
    checked: list[str]  # the open findings it may end
    r_before: float  # median r of the usable windows just before it [-]
    n_before: int  # how many windows that median is of
    held: list[int] = field(default_factory=list)  # windows since, not yet replayed
    usable: list[int] = field(default_factory=list)  # those of them with a usable r


@dataclass(frozen=True)
class _Pending:
    """A step candidate waiting for the next window: where, how big, what saw it."""

    j: int  # the window it showed in
    z: float  # its prediction error in σ [-]
    e: float  # its prediction error [-]
    first: int  # first window of the change (the CUSUM change point)
    trigger: str  # "jump", "offset" or "cusum"
    dc: float  # constant-offset change for "offset" [Pa]


@dataclass
class _Baseline:
    r0: float
    sigma_r: float
    s_b: float
    pe: float
    sigma_pe: float
    s: float
    sigma_s: float
    sse_per_sample: float  # residual of the best one-parameter fit of a window [Pa²]
    offset0: float  # static offset of the baseline windows against the baseline [Pa]
    sigma_offset: float  # its day-to-day scatter [Pa]


def _offset_comparison(
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


def read_tails(hist: pd.DataFrame) -> pd.DataFrame:
    """Windows with a tail (`TAIL_COLUMNS`) read as their tail; ``change_at`` is when the
    window's state began: the step inside it, else the window start. A tail may carry a
    logged end pressure only (a back-pressure step too late for a fit after it)."""
    hist = hist.copy()
    hist["change_at"] = hist["window_start"]
    if "tail_offset_s" not in hist.columns:
        return hist
    step = np.isfinite(numeric(hist, "tail_offset_s"))
    if not step.any():
        return hist
    fitted = step & np.isfinite(numeric(hist, "tail_r"))
    # the back-pressure was not fitted at all (a known termination) in the whole window:
    # nor was it in the tail
    known = np.zeros(len(hist), dtype=bool)
    if "identifiable" in hist.columns:
        known = (hist["identifiable"].astype("boolean").fillna(False).to_numpy(bool)
                 & ~np.isfinite(numeric(hist, "s_pa")))
    for col, src in TAIL_COLUMNS.items():
        if src not in hist.columns:
            continue
        value = numeric(hist, src)
        rows = step if col == "end_pressure_pa" else fitted
        # a tail's s is NaN where it was not identifiable; other NaNs were not logged
        rows = rows if col == "s_pa" else rows & np.isfinite(value)
        if col not in hist.columns or hist[col].dtype == object:
            hist[col] = numeric(hist, col)
        hist.loc[rows, col] = value[rows]
    if "identifiable" in hist.columns:
        hist["identifiable"] = hist["identifiable"].astype(object)
        hist.loc[fitted, "identifiable"] = (known | np.isfinite(numeric(hist, "s_pa")))[fitted]
    offset = np.where(step, numeric(hist, "tail_offset_s"), 0.0)
    hist["change_at"] = (hist["window_start"] + pd.to_timedelta(offset, unit="s")).dt.floor("s")
    return hist


def numeric(frame: pd.DataFrame, c: str) -> NDArray[np.float64]:
    """Column *c* of *frame* as floats (NaN where missing or not a number)."""
    if c in frame.columns:
        return np.asarray(pd.to_numeric(frame[c], errors="coerce"), dtype=float)
    return np.full(len(frame), np.nan)


class BranchReplay:
    """Walks one branch's windows in time order; see the module docstring."""

    def __init__(
        self, name: str, rows: pd.DataFrame, flagged: set[pd.Timestamp],
        balance: pd.DataFrame | None, bs: BranchSettings, cfg: DiagnosisSettings,
        numbers: dict[str, NDArray[np.float64]],
    ) -> None:  # fmt: skip
        self.name, self.rows, self.flagged, self.bs, self.cfg = name, rows, flagged, bs, cfg
        self.balance = balance  # indexed by window_start, or None
        self.col = numbers  # the optional numeric columns of `HISTORY_COLUMNS`, row order
        self.ident = (
            rows["identifiable"].fillna(False).astype(bool).to_numpy()
            if "identifiable" in rows.columns
            else np.zeros(len(rows), dtype=bool)
        )
        self.r: NDArray[np.float64] = np.array(
            rows["r"], dtype=np.float64
        )  # a copy: back-pressure shifts edit it
        self.ws = list(rows["window_start"])
        # when each window's state began: a step inside it, else its start
        self.at = list(rows["change_at"]) if "change_at" in rows.columns else self.ws
        self.we = list(rows["window_end"])
        self.t0 = self.ws[0] if self.ws else pd.Timestamp(0, tz="UTC")
        # window starts in days since the first window [d]
        since = pd.DatetimeIndex(rows["window_start"]) - self.t0
        self.day: NDArray[np.float64] = np.asarray(since / _DAY, dtype=np.float64)
        self.open: dict[str, _Open] = {}
        self.done: list[Finding] = []
        self.first_segment = True
        self.rel_errors: list[float] = []  # relative prediction errors of accepted windows
        self.s_shift = 0.0  # back-pressure change found from r, taken out of later r [Pa]
        self.verify: _Verify | None = None  # a maintenance event waiting for its check
        self._new_segment()

    def _when(self, t: pd.Timestamp, j: int | None = None) -> str:
        """*t* as the site's date — with the time of day when it is a step inside window
        *j* rather than the window's start — for the messages an engineer reads."""
        local = pd.Timestamp(t).tz_convert(self.cfg.timezone)
        if j is not None and pd.Timestamp(t) != self.ws[j]:
            return f"{local:%Y-%m-%d %H:%M}"
        return f"{local:%Y-%m-%d}"

    def _numbers(self, j: int) -> dict[str, float]:
        """The numeric columns of window j."""
        return {c: float(v[j]) for c, v in self.col.items()}

    def _shift_static(self, j: int, offset: float) -> None:
        """Take a back-pressure change of ``offset`` [Pa] out of r from window j on: the
        least-squares r of ``y − c`` is r − c·Σx/Σx² (the window's sums)."""
        sx, sxx = self.col["sum_x"][j:], self.col["sum_xx"][j:]
        ok = np.isfinite(sx) & np.isfinite(sxx) & (sxx > 0)
        self.r[j:][ok] -= offset * sx[ok] / sxx[ok]
        self.s_shift += offset

    def _new_segment(self) -> None:
        self.base: _Baseline | None = None
        self.base_idx: list[int] = []
        self.usable: list[int] = []  # windows of the segment with a usable r
        self._reset_level()

    def _reset_level(self) -> None:
        self.level: list[int] = []  # accepted windows predicting the next one
        self.trend: list[int] = []  # accepted windows of the fouling trend
        self.cusum = 0.0
        self.trend_hits = 0
        self.cusum_start = -1  # first window of the current CUSUM run
        self.pending: _Pending | None = None
        self.prev_dev: tuple[int, float, float] = (-1, 0.0, math.nan)  # (window, z, offset)
        self.recent_pe: list[float] = []
        self.recent_s: list[float] = []

    def _end(self, kind: str, when: pd.Timestamp) -> None:
        f = self.open.pop(kind, None)
        if f is not None:
            self.done.append(f.close(self.name, when))

    def _open(self, f: _Open) -> None:
        if f.kind not in self.open:
            self.open[f.kind] = f
            logger.info("%s: %s from %s", self.name, f.kind, f.start)

    # -- main loop -------------------------------------------------------------------
    def run(self, events: pd.DataFrame) -> list[Finding]:
        ev = list(zip(events["time"], events["kind"], strict=True))
        k = 0
        for i in range(len(self.rows)):
            while k < len(ev) and ev[k][0] <= self.ws[i]:
                self._event(pd.Timestamp(ev[k][0]), str(ev[k][1]))
                k += 1
            if self.verify is not None:
                self._hold(i)
            else:
                self._window(i)
        if self.verify is not None:
            self._settle(at_end=True)
        if self.we:
            self._expire(self.we[-1])
        return self.done + [f.close(self.name, None) for f in self.open.values()]

    def _window(self, i: int, *, low_flow: bool = True) -> None:
        if self.ws[i] not in self.flagged and math.isfinite(self.r[i]):
            self.usable.append(i)
            if self.base is None:
                self._collect_baseline(i)
            else:
                self._pressures(i)
                self._steps(i)
                self._fouling(i)
                self._unlogged_fall(i)
        elif self.ws[i] not in self.flagged and self.base is not None:
            # no usable r (too few steady samples), but a logged termination
            # pressure still shows a back-pressure step
            self._pressures(i)
        if low_flow:
            self._low_flow(i)

    # -- maintenance events ----------------------------------------------------------
    def _event(self, when: pd.Timestamp, kind: str) -> None:
        """A maintenance event: end what it ends, or hold the findings of a raised r
        until the fits after it show whether it brought r down (`_settle`)."""
        if self.verify is not None:
            self._settle()
        ends = END_BY_EVENT.get(kind, frozenset())
        checked = [f for f in sorted(ends & CHECKED_BY_FITS) if f in self.open]
        for ended in sorted(ends - set(checked)):
            self._end(ended, when)
        before = self.usable[-self.cfg.verify_windows :]
        if checked and before and self.base is not None:
            self.verify = _Verify(when, kind, checked, float(median(self.r[before])),
                                  len(before))  # fmt: skip
            return
        for ended in checked:
            self._end(ended, when)
        self.first_segment = False
        self._new_segment()

    def _hold(self, i: int) -> None:
        """Window i comes after an event still being checked: kept for later."""
        v = self.verify
        assert v is not None
        v.held.append(i)
        if self.ws[i] not in self.flagged and math.isfinite(self.r[i]):
            v.usable.append(i)
        self._low_flow(i)
        if len(v.usable) >= self.cfg.verify_windows:
            self._settle()

    def _settle(self, *, at_end: bool = False) -> None:
        """Judge the held event on the usable windows after it, then replay them."""
        v = self.verify
        assert v is not None and self.base is not None
        self.verify = None
        word = EVENT_WORDS.get(v.kind, v.kind.replace("_", " "))
        day = self._when(v.when)
        if at_end and len(v.usable) < self.cfg.verify_windows:
            # the fits after it are too few to tell yet; the next diagnosis decides
            after = (f", {float(median(self.r[v.usable])):.2f} in the {len(v.usable)} "
                     "window(s) since" if v.usable else "")  # fmt: skip
            for kind in v.checked:
                self.open[kind].note = (
                    f"The {word} logged on {day} is not checked yet ({len(v.usable)} of "
                    f"{self.cfg.verify_windows} windows after it fitted): r "
                    f"{v.r_before:.2f} before{after}."
                )
            return
        if not v.usable:  # another event came before any usable window: that one decides
            for j in v.held:
                self._window(j, low_flow=False)
            return
        r_after = float(median(self.r[v.usable]))
        worked = [kind for kind in v.checked if self._brought_down(kind, v, r_after)]
        for kind in worked:
            self._end(kind, v.when)
        for kind in v.checked:
            if kind in worked:
                continue
            f = self.open[kind]
            # visible: beyond the day-to-day scatter of r (relative, so at r's level)
            # and a fifth of the rise; the medians either side are of a few windows only
            fall = v.r_before - r_after
            scatter = 3.0 * self.base.sigma_r * v.r_before / self.base.r0
            effect = (
                "had no visible effect" if fall < max(scatter, 0.2 * (v.r_before - f.ref))
                else f"took off only part of the rise (baseline {f.ref:.2f})"
            )
            f.note = (f"The {word} logged on {day} {effect}: r {v.r_before:.2f} before, "
                      f"{r_after:.2f} after.")  # fmt: skip
            f.event = {"event_r_before": v.r_before, "event_r_after": r_after,
                       "event_windows_after": float(len(v.usable))}  # fmt: skip
            logger.info("%s: %s on %s did not end the %s finding (r %.3f -> %.3f)",
                        self.name, v.kind, day, kind, v.r_before, r_after)  # fmt: skip
        if len(worked) == len(v.checked):
            self.first_segment = False
            self._new_segment()
        for j in v.held:
            self._window(j, low_flow=False)

    def _brought_down(self, kind: str, v: _Verify, r_after: float) -> bool:
        """The fits after the event show the raised r of finding *kind* back down."""
        f = self.open[kind]
        if kind == "restriction":
            return bool(r_after < f.ref + f.step / 2)
        rise = v.r_before - f.ref
        back = r_after - f.ref <= 0.5 * rise if rise > 0 else True
        return bool(r_after < self.bs.cleaning_limit_r and back)

    def _collect_baseline(self, i: int) -> None:
        period = self.bs.commissioning if self.first_segment else None
        if period is not None:
            lo, hi = pd.Timestamp(period[0]), pd.Timestamp(period[1])
            if lo <= self.ws[i] and self.we[i] <= hi:
                self.base_idx.append(i)
            ready = self.ws[i] >= hi and len(self.base_idx) >= 3
            if not ready:
                return
        else:
            self.base_idx.append(i)
            if len(self.base_idx) < self.cfg.baseline_windows:
                return
        idx = np.array(self.base_idx)
        rb = self.r[idx]
        r0 = float(median(rb))
        sig = max(robust_sigma(rb), self.cfg.min_sigma_r * r0)
        pe = self.col["end_pressure_pa"][idx]
        s = self.col["s_pa"][idx][self.ident[idx]]
        s_fixed = self.col["s_fixed_pa"][idx]
        s_b = (
            float(median(s)) if np.isfinite(s).sum() >= 3
            else float(np.nanmedian(s_fixed)) if np.isfinite(s_fixed).any() else 0.0
        )  # fmt: skip
        self.base = _Baseline(
            r0=r0, sigma_r=sig, s_b=s_b,
            pe=float(np.nanmedian(pe)) if np.isfinite(pe).any() else math.nan,
            sigma_pe=max(robust_sigma(pe), self.cfg.min_sigma_pa),
            s=float(median(s)) if np.isfinite(s).sum() >= 3 else math.nan,
            sigma_s=max(robust_sigma(s), self.cfg.min_sigma_pa),
            **self._baseline_offsets(idx, r0, s_b),
        )  # fmt: skip
        self.level = [j for j in self.base_idx if self.ws[j] >= self.ws[self.base_idx[0]]]
        self.trend = list(self.level)
        if period is None:  # the baseline windows of a segment are its first windows
            self.level, self.trend = list(self.base_idx), list(self.base_idx)

    def _baseline_offsets(self, idx: NDArray[np.intp], r0: float, s_b: float) -> dict[str, float]:
        per, offsets = [], []
        for j in idx:
            cmp = _offset_comparison(self._numbers(int(j)), r0, s_b, self.cfg)
            if cmp is not None and cmp["samples"] > 0:
                per.append(min(cmp["sse_static"], cmp["sse_resistance"]) / cmp["samples"])
                offsets.append(cmp["static_offset_pa"])
        nan = math.nan
        return {
            "sse_per_sample": float(median(per)) if per else nan,
            "offset0": float(np.nanmedian(offsets)) if np.isfinite(offsets).any() else nan,
            "sigma_offset": max(robust_sigma(offsets), self.cfg.min_sigma_pa),
        }

    # -- back-pressure from logged termination pressure or fitted s ------------------
    def _pressures(self, i: int) -> None:
        assert self.base is not None
        for series, recent, sigma in (
            (self.col["end_pressure_pa"], self.recent_pe, self.base.sigma_pe),
            (self.col["s_pa"] if self.ident[i] else None, self.recent_s, self.base.sigma_s),
        ):
            if series is None or not math.isfinite(series[i]):
                continue
            v = float(series[i])
            ref = float(median(recent[-7:])) if recent else math.nan
            bp = self.open.get("back_pressure")
            if bp is not None and math.isfinite(bp.ref) and abs(v - bp.ref) < abs(bp.step) / 2:
                self._end("back_pressure", self.ws[i])
                recent.clear()
            elif math.isfinite(ref):
                delta = v - ref
                if abs(delta) >= max(self.cfg.bp_step_z * sigma, self.cfg.min_bp_step_pa):
                    self._open(_Open(
                        "back_pressure", self.at[i], self.we[i], 0.95,
                        {"step_pa": delta, "step_sigma": delta / sigma, "before_pa": ref,
                         "after_pa": v},
                        f"{self.name}: the back-pressure at its end moved by "
                        f"{delta / 1e5:+.2f} bar on {self._when(self.at[i], i)} "
                        f"(from {ref / 1e5:.2f} to {v / 1e5:.2f} bar gauge).",
                        ref=ref, step=delta,
                    ))  # fmt: skip
                    recent.clear()
            recent.append(v)

    # -- steps in r ----------------------------------------------------------------------
    def _predict(self, i: int) -> float | None:
        pts = self.level[-self.cfg.level_windows :]
        if len(pts) < 2:
            return None
        y = self.r[pts]
        if len(pts) < 7:
            return float(median(y))
        t = self.day[pts]
        slope, _ = sen_slope(t, y)
        # a falling level is not extrapolated: r does not foul backwards
        return float(median(y) + max(slope, 0.0) * (self.day[i] - median(t)))

    def _steps(self, i: int) -> None:
        assert self.base is not None
        if self.pending is not None:
            if self._confirmed(i):
                # A ramp cannot pass the window-to-window rise test of `_jump_rise`, so
                # the confirming window decides: a step part-way through window j shows
                # in full here.
                self._decide_step(i)
                return
            # one window out of line and back again: an outlier fit, not a step
            self.pending = None
        self._confirm_at_once(i)
        rst = self.open.get("restriction")
        if rst is not None and self.r[i] < rst.ref + rst.step / 2:
            self._end("restriction", self.ws[i])
            self._reset_level()
            self.level, self.trend = [i], [i]
            return
        pred = self._predict(i)
        if pred is None:
            self.level.append(i)
            self.trend.append(i)
            return
        e = float(self.r[i] - pred)
        # Scatter of the relative prediction error [-]: the baseline's (a fourteen-window
        # estimate, often low under AR(1) correlation) or, once there are enough, that of
        # the recent prediction errors, whichever is larger. r's scatter is relative, so
        # σ scales with the predicted level.
        rel = 1.25 * self.base.sigma_r / self.base.r0
        if len(self.rel_errors) >= 10:
            rel = max(rel, robust_sigma(self.rel_errors[-60:]))
        z = e / (rel * pred)
        if self.cusum == 0.0:
            self.cusum_start = i
        self.cusum = max(0.0, self.cusum + z - self.cfg.cusum_k)
        big = (
            abs(e) >= self.cfg.min_step_rel * pred
            and abs(z) >= self.cfg.step_z
            and self._jump_rise(i, e, pred)
        )
        dc = self._offset_change(i)
        trigger = ""
        if big:
            trigger = "jump"
        elif math.isfinite(dc) and self._offset_rise(dc):
            trigger = "offset"
        elif self.cusum > self.cfg.cusum_h and self._cusum_step(i):
            trigger = "cusum"
        if trigger:
            first = self.cusum_start if trigger == "cusum" else i  # Page's change point
            self.pending = _Pending(i, z, e, first, trigger, 0.0 if math.isnan(dc) else dc)
            if trigger != "cusum" and self._began_before(i, z, dc):
                # the window before already leaned the same way: the step began part-way
                # through it, and it confirms this one
                self.pending = _Pending(i, z, e, self.prev_dev[0], trigger, self.pending.dc)
                if self._classify(i)[0] is not None:
                    self._decide_step(i)
            elif trigger == "jump" and self._clear_at_once(i, z, e, pred):
                self._decide_step(i)
            return  # otherwise the next window confirms it (or shows it was an outlier)
        self.prev_dev = (i, z, self._raw_offset(i))
        self.rel_errors.append(e / pred)
        self.level.append(i)
        self.trend.append(i)

    def _confirm_at_once(self, i: int) -> None:
        """A step reported in its own window is confirmed when the next usable window
        stays on the new level (if it falls back, `_steps` ends the finding instead)."""
        for f in self.open.values():
            if f.evidence.get("confirmed") != 0.0:
                continue
            after = f.evidence.get("r_after", math.nan)
            if math.isfinite(after) and abs(self.r[i] - after) < abs(f.step) / 2:
                f.evidence["confirmed"] = 1.0
                f.confidence = min(f.confidence / self.cfg.at_once_discount, 1.0)

    def _jump_rise(self, i: int, e: float, pred: float) -> bool:
        """A step rises within one or two windows; a fouling ramp, however fast, climbs a
        little every window. The rise of window i over the last accepted window (or the
        one before it, when the step began part-way through that one) must be most of the
        prediction error, and far more than the recent slope makes in those windows."""
        if not self.level:
            return True
        back = self.level[-2:] if len(self.level) >= 2 else self.level[-1:]
        rises = [float(self.r[i] - self.r[k]) for k in back]
        rise = max(rises, key=abs)
        pts = self.level[-self.cfg.level_windows :]
        slope = 0.0
        if len(pts) >= 7:
            slope = max(sen_slope(self.day[pts], self.r[pts])[0], 0.0)
        span = float(self.day[i] - self.day[back[0]])
        need = max(0.5 * abs(e), self.cfg.min_step_rel * pred, 3.0 * slope * span)
        return bool(rise * e > 0 and abs(rise) >= need)

    def _clear_at_once(self, i: int, z: float, e: float, pred: float) -> bool:
        """A jump so large against the scatter, on a window whose own r interval is
        narrow and which fits one cause cleanly, is reported in that same window rather
        than after the next one (the next window can still end it: `_steps`)."""
        if abs(z) < self.cfg.at_once_z or abs(e) < self.cfg.at_once_rel * pred:
            return False
        lo, hi = self.col["r_low"][i], self.col["r_high"][i]
        if not (math.isfinite(lo) and math.isfinite(hi)) or hi - lo > 0.5 * abs(e):
            return False
        kind = self._classify(i)[0]
        # r falls at once only when the back-pressure fell (or a restriction cleared,
        # which `_steps` handles as the end of the open finding)
        return kind is not None if e > 0 else kind == "back_pressure"

    def _offset_rise(self, dc: float) -> bool:
        """The constant offset came within one or two windows (a back-pressure step), not
        a little every window (a fouling ramp read on a narrow flow range)."""
        before = [self._raw_offset(k) for k in self.level[-2:]]
        before = [b for b in before if math.isfinite(b)]
        if not before:
            return True
        rise = max((dc - b for b in before), key=abs)
        return bool(rise * dc > 0 and abs(rise) >= 0.7 * abs(dc))

    def _raw_offset(self, i: int) -> float:
        """Constant offset of window i against the baseline model, less the baseline's [Pa]."""
        assert self.base is not None
        cmp = _offset_comparison(
            self._numbers(i), self.base.r0, self.base.s_b + self.s_shift, self.cfg
        )
        if cmp is None or not math.isfinite(self.base.offset0):
            return math.nan
        return float(cmp["static_offset_pa"] - self.base.offset0)

    def _began_before(self, i: int, z: float, dc: float) -> bool:
        j, z_prev, dc_prev = self.prev_dev
        if j < 0 or self.level[-1:] != [j]:
            return False
        # the window before leaned the same way by 3σ, or leaned at all and fits neither
        # one-parameter cause (a step late in it leaves too little to show in its r)
        leaned_r = z * z_prev > 0 and (abs(z_prev) >= 3.0 or self._mixed(j))
        if math.isfinite(dc) and math.isfinite(dc_prev):
            assert self.base is not None
            floor = max(0.2 * abs(dc), 2.5 * self.base.sigma_offset)
            return leaned_r or (dc * dc_prev > 0 and abs(dc_prev) >= floor)
        return leaned_r

    def _mixed(self, j: int) -> bool:
        """Window j fits neither "constant offset" nor "offset ∝ Q²" against the baseline
        (its best residual is ``mixed_factor`` × the baseline's): a change inside it."""
        assert self.base is not None
        cmp = _offset_comparison(
            self._numbers(j), self.base.r0, self.base.s_b + self.s_shift, self.cfg
        )
        if cmp is None or not math.isfinite(self.base.sse_per_sample):
            return False
        best = min(cmp["sse_static"], cmp["sse_resistance"]) / max(cmp["samples"], 1.0)
        return bool(best > self.cfg.mixed_factor * self.base.sse_per_sample)

    def _confirmed(self, i: int) -> bool:
        """The window after a step candidate stays on the new side of it."""
        p = self.pending
        assert p is not None
        if p.trigger == "cusum":
            return True  # the CUSUM has already accumulated several windows
        if p.trigger == "offset":
            dc = self._offset_change(i)
            return math.isfinite(dc) and dc * p.dc > 0 and abs(dc) >= 0.5 * abs(p.dc)
        ref = float(self.r[p.j] - p.e)
        return (self.r[i] - ref) * p.e >= 0.5 * p.e * p.e

    def _offset_change(self, i: int) -> float:
        """Change of the window's constant offset against the baseline model [Pa], when it
        is a clear back-pressure step (see `_offset_jump`), else NaN."""
        if not self._offset_jump(i):
            return math.nan
        assert self.base is not None
        cmp = _offset_comparison(
            self._numbers(i), self.base.r0, self.base.s_b + self.s_shift, self.cfg
        )
        assert cmp is not None
        return float(cmp["static_offset_pa"] - self.base.offset0)

    def _offset_jump(self, i: int) -> bool:
        """A window whose departure from the baseline model is a clear constant offset of
        at least ``min_bp_step_pa``: a back-pressure step too small against the day-to-day
        scatter of r to show as a jump of r (a large ΔP branch, a small step)."""
        assert self.base is not None
        if not math.isfinite(self.base.offset0):
            return False
        cmp = _offset_comparison(
            self._numbers(i), self.base.r0, self.base.s_b + self.s_shift, self.cfg
        )
        if cmp is None or not math.isfinite(cmp["static_offset_pa"]):
            return False
        dc = cmp["static_offset_pa"] - self.base.offset0
        big = abs(dc) >= max(self.cfg.min_bp_step_pa, self.cfg.bp_step_z * self.base.sigma_offset)
        return big and cmp["offset_llr"] > self.cfg.offset_evidence

    def _cusum_step(self, i: int) -> bool:
        """A CUSUM alarm counts as a step when one mean shift fits the recent windows
        clearly better than a straight line (a fouling ramp also drives the CUSUM)."""
        pts = [*self.level[-2 * self.cfg.level_windows :], i]
        if len(pts) < 8:
            return False
        y = self.r[pts]
        t = self.day[pts]
        ms = mean_shift(y, min_size=3)
        line = np.polyfit(t, y, 1)
        sse_line = float(np.sum((y - np.polyval(line, t)) ** 2))
        sse_step = ms.sigma**2 * max(len(y) - 2, 1)
        # A ramp that begins inside the look-back is "flat, then a line": the step must
        # beat that too, and happen within two windows, not spread over a curving ramp.
        sse_hinge = sse_line
        for knot in t[1:-2]:
            a = np.column_stack([np.ones_like(t), np.clip(t - knot, 0.0, None)])
            coef, *_ = np.linalg.lstsq(a, y, rcond=None)
            sse_hinge = min(sse_hinge, float(np.sum((y - a @ coef) ** 2)))
        two = float(np.max(y[2:] - y[:-2])) if len(y) > 2 else 0.0
        return ms.step > 0 and sse_step < 0.5 * sse_hinge and two >= 0.8 * ms.step

    def _decide_step(self, i: int) -> None:
        """Name the confirmed change of window ``pending.j`` (window i is the one after)."""
        assert self.base is not None and self.pending is not None
        j, z, e, first = self.pending.j, self.pending.z, self.pending.e, self.pending.first
        self.pending = None
        kind, conf, extra = self._classify(j)
        if kind is None:
            kind, conf, extra = self._classify(i, final=True)
        if kind is None:
            kind, conf = "restriction", 0.5
        ref = float(self.r[j] - e)
        up = self.r[i] > ref
        bp = self.open.get("back_pressure")
        c = extra.get("static_offset_pa", math.nan)
        if kind == "back_pressure" and bp is not None:
            if math.isfinite(c) and c * bp.evidence.get("static_offset_pa", 0.0) < 0:
                self._end("back_pressure", self.ws[first])  # it went back
                self._shift_static(i, c)
            self._restart(i)
            return
        if not up:
            if kind == "restriction":
                self._end("restriction", self.ws[first])
            elif kind == "instrument":
                self._end("instrument", self.ws[first])
            if kind != "back_pressure":
                self._restart(i)  # r fell: cleared or improved; nothing to report
                return
        start = self.at[first]
        ref = float(self.r[j] - e)
        e = float(self.r[i] - ref)  # the full step (window i is past a deferred one)
        # r_baseline: the reference the cost of the change is counted from
        evidence = {"step_r": e, "step_sigma": z, "r_before": ref, "r_baseline": ref,
                    "r_after": float(self.r[i]), "cusum": self.cusum,
                    "sigma_r": self.base.sigma_r, **extra}  # fmt: skip
        day = self._when(start, first)
        if kind == "back_pressure":
            c = extra.get("static_offset_pa", math.nan)
            size = f" by about {c / 1e5:+.2f} bar" if math.isfinite(c) else ""
            msg = (
                f"{self.name}: the back-pressure at its end changed{size} on {day}; the "
                f"offset is the same at every flow (it reads as r {ref:.2f} → {self.r[i]:.2f})."
            )
        else:
            words = {
                "restriction": "a restriction (valve throttled or closed, debris)",
                "instrument": "its flow meter (the header mass balance moved with it)",
            }[kind]
            msg = (
                f"{self.name}: resistance ratio stepped from {ref:.2f} to {self.r[i]:.2f} "
                f"({100 * e / ref:+.0f} %) on {day}; most likely {words}."
            )
        if j == i:  # reported in its own window: the next one confirms it
            evidence["confirmed"] = 0.0
            conf *= self.cfg.at_once_discount
        self._open(_Open(kind, start, self.we[i], conf, evidence, msg, ref=ref, step=e))
        if kind == "back_pressure" and math.isfinite(extra.get("static_offset_pa", math.nan)):
            self._shift_static(i, extra["static_offset_pa"])
        self._restart(i)

    def _restart(self, i: int) -> None:
        """After a change the level and the trend start again at window i."""
        self._reset_level()
        self.level, self.trend = [i], [i]

    def _classify(
        self, j: int, *, final: bool = False
    ) -> tuple[str | None, float, dict[str, float]]:
        """The cause of a step seen in window j; None = undecided (decide later).

        A window the step falls part-way through fits neither one-parameter hypothesis
        (its best residual is ``mixed_factor`` × the baseline's): its comparison is biased
        by when in the day the step came, so it is left to the next window.
        """
        assert self.base is not None
        meter = self._meter_disagrees(j)
        if meter is not None:
            return "instrument", 0.8, meter
        cmp = _offset_comparison(
            self._numbers(j), self.base.r0, self.base.s_b + self.s_shift, self.cfg
        )
        if cmp is None:
            return "restriction", 0.5, {}
        best = min(cmp["sse_static"], cmp["sse_resistance"]) / max(cmp["samples"], 1.0)
        if not final and best > self.cfg.mixed_factor * self.base.sse_per_sample:
            return None, 0.0, cmp
        llr = cmp["offset_llr"]
        if abs(llr) < self.cfg.offset_evidence:
            if self._termination_known(j):
                # too narrow a flow range to tell the shapes apart, but the back-pressure
                # is logged or fixed (open end, logged level or header pressure): the
                # change is the branch's own resistance
                return "restriction", 0.7, cmp
            return None, 0.0, cmp
        conf = 1.0 / (1.0 + math.exp(-abs(llr)))
        return ("back_pressure" if llr > 0 else "restriction"), conf, cmp

    def _termination_known(self, j: int) -> bool:
        """Window j's fit held the back-pressure known (not fitted: s_pa is NaN) because
        the termination is open or its level or pressure is logged, not because s could
        not be separated from r."""
        return bool(self.ident[j]) and not math.isfinite(self.col["s_pa"][j])

    def _meter_disagrees(self, j: int) -> dict[str, float] | None:
        """A real restriction leaves Σ branch − total unchanged (both meters see the
        water go); a meter fault moves the balance by the meter's own change."""
        if self.balance is None or self.ws[j] not in self.balance.index:
            return None
        flow = self.col["mean_flow_m3s"]
        before = [p for p in self.level[-7:] if self.ws[p] in self.balance.index]
        if not before or not math.isfinite(flow[j]):
            return None
        dq = float(flow[j] - np.nanmedian(flow[before]))
        res = self.balance["residual_m3s"]
        dres = float(res.loc[self.ws[j]] - median(res.loc[[self.ws[p] for p in before]]))
        u = float(self.balance["uncertainty_m3s"].loc[self.ws[j]])
        if abs(dres) > u and dq * dres > 0 and abs(dres - dq) < 0.5 * abs(dq):
            return {"meter_change_m3s": dq, "balance_change_m3s": dres, "balance_u_m3s": u}
        return None

    # -- fouling ---------------------------------------------------------------------------
    def _fouling(self, i: int) -> None:
        assert self.base is not None
        if len(self.trend) < self.cfg.min_trend_windows or self.trend[-1] != i:
            return
        fouling = self.open.get("fouling")
        if fouling is None:
            found = self._trend_test()
            self.trend_hits = self.trend_hits + 1 if found is not None else 0
            if found is None or self.trend_hits < self.cfg.trend_persistence:
                return
            pts, fit = found
            ref = self._trend_ref(pts)
            t_on = self._onset(self.day[pts], self.r[pts])
            fouling = _Open("fouling", self.t0 + t_on * _DAY, self.we[i], 0.0, {}, "", ref=ref)
            self._open(fouling)
        # evidence from the windows since the onset (at least 6 of them)
        pts = [j for j in self.trend if self.ws[j] >= fouling.start]
        if len(pts) < 6:
            pts = self.trend[-6:]
        pts = pts[-self.cfg.max_trend_windows :]
        t = self.day[pts]
        y = self.r[pts]
        fit = theil_sen(t, y)
        mk = mann_kendall(y)
        rise = max(fit.intercept + fit.slope * t[-1] - fouling.ref, 0.0)
        # Theil–Sen's slope interval assumes independent windows: widen it by the
        # Hamed–Rao variance factor so the forecast interval is honest.
        widen = math.sqrt(max(mk.correction, 1.0))
        wide = TheilSen(
            slope=fit.slope, intercept=fit.intercept,
            slope_low=fit.slope - widen * (fit.slope - fit.slope_low),
            slope_high=fit.slope + widen * (fit.slope_high - fit.slope),
            confidence=fit.confidence, n=fit.n,
        )  # fmt: skip
        limit = self.bs.cleaning_limit_r
        cross = crossing_forecast(wide, limit=limit, t_now=t[-1])
        horizon = 3650.0  # forecasts beyond ten years are "not in sight" [d]
        if cross.eta is not None and cross.eta > horizon:
            cross = type(cross)(cross.level_now, None, cross.eta_low, None, False)
        if cross.eta_low is not None and cross.eta_low > horizon:
            cross = type(cross)(cross.level_now, cross.eta, None, cross.eta_high, False)
        if cross.eta_high is not None and cross.eta_high > horizon:
            cross = type(cross)(cross.level_now, cross.eta, cross.eta_low, None, False)
        nan = math.nan
        fouling.evidence = {
            "slope_per_day": fit.slope, "slope_low_per_day": wide.slope_low,
            "slope_high_per_day": wide.slope_high, "mk_z": mk.z, "mk_p": mk.p,
            "hamed_rao_factor": mk.correction, "windows": float(len(pts)),
            "r_baseline": fouling.ref, "r_now": cross.level_now, "rise_r": rise,
            "cleaning_limit_r": limit,
            "days_to_limit": nan if cross.eta is None else cross.eta,
            "days_to_limit_low": nan if cross.eta_low is None else cross.eta_low,
            "days_to_limit_high": nan if cross.eta_high is None else cross.eta_high,
        }  # fmt: skip
        # How sure the branch is fouled: the trend's verdict while r climbs, and once it
        # levels off (a deposit that stopped growing is still there) how far the recent
        # level stands above the baseline, against the day-to-day scatter.
        level = median(self.r[self.trend[-7:]])
        above = max(level - fouling.ref, 0.0)
        settled = (1.0 - math.exp(-above / self.cfg.min_rise_r)
                   if above >= self.cfg.min_rise_sigma * self.base.sigma_r else 0.0)
        fouling.evidence["r_recent"] = level
        if level >= limit and fouling.limit_passed is None:
            # the date it passed: the first of the recent windows at or above the limit
            fouling.limit_passed = min(self.ws[j] for j in self.trend[-7:] if self.r[j] >= limit)
        passed = fouling.limit_passed
        fouling.evidence["limit_passed_s"] = nan if passed is None else passed.timestamp()
        fouling.evidence["priority"] = 2.0 if passed is None else 3.0  # `PRIORITIES`
        fouling.confidence = max(
            (1.0 - mk.p) * (1.0 - math.exp(-rise / self.cfg.min_rise_r)), settled
        )
        rising = mk.p < self.cfg.trend_alpha and fit.slope > 0
        t_last = self.ws[i]
        # the forecast as dates (UTC seconds since 1970), for the report to show as the
        # message does: the interval runs from the earliest to the latest date
        for key, eta in (("limit_date_s", cross.eta), ("limit_date_low_s", cross.eta_low),
                         ("limit_date_high_s", cross.eta_high)):
            fouling.evidence[key] = (
                nan if eta is None else (t_last + eta * _DAY).timestamp()
            )
        if passed is not None:
            when = f"it passed its cleaning limit {limit:.2f} on {self._when(passed)}"
        elif cross.reached:
            when = f"it is at the cleaning limit {limit:.2f}"
        elif cross.eta is None:
            when = "the rate is too uncertain to forecast the cleaning date"
        else:
            lo = "now" if cross.eta_low is None else self._when(t_last + cross.eta_low * _DAY)
            hi = "later" if cross.eta_high is None else self._when(t_last + cross.eta_high * _DAY)
            when = (f"at this rate it reaches the cleaning limit {limit:.2f} about "
                    f"{self._when(t_last + cross.eta * _DAY)} (between {lo} and {hi})")  # fmt: skip
        if rising:
            fouling.message = (
                f"{self.name} is fouling: resistance ratio {fouling.ref:.2f} → "
                f"{cross.level_now:.2f}, rising {fit.slope * 30:.3f} per month; {when}."
            )
        else:
            span = float((self.we[pts[-1]] - self.ws[pts[0]]) / _DAY)
            where = (f"it passed its cleaning limit {limit:.2f} on {self._when(passed)}"
                     if passed is not None else f"below the cleaning limit {limit:.2f}")
            fouling.message = (
                f"{self.name} has fouled: resistance ratio {fouling.ref:.2f} → {level:.2f} "
                f"since {self._when(fouling.start)}, not rising over the last "
                f"{span:.0f} days ({fit.slope * 30:+.3f} per month); {where}."
            )

    def _unlogged_fall(self, i: int) -> None:
        """A fouled r back near its baseline with no maintenance logged: an unlogged
        cleaning (or a removed restriction). Once ``verify_windows`` usable windows in a
        row stand in the lower half of the rise (and below the cleaning limit) and the
        fall from the peak is beyond the day-to-day scatter, the finding ends at the fall
        and a new baseline is taken, as after a logged cleaning."""
        f = self.open.get("fouling")
        if f is None or self.base is None or not self.usable:
            return
        level = float(median(self.r[self.usable[-5:]]))
        if not math.isfinite(f.peak) or level > f.peak:
            f.peak = level
        rise = f.peak - f.ref
        if rise < self.cfg.min_rise_r * f.ref:
            return
        mid = f.ref + 0.5 * rise
        run: list[int] = []
        for j in reversed(self.usable):
            if self.r[j] > mid:
                break
            run.append(j)
        if len(run) < self.cfg.verify_windows:
            return
        after = float(median(self.r[run]))
        scatter = 3.0 * self.base.sigma_r * f.peak / self.base.r0
        if after >= self.bs.cleaning_limit_r or f.peak - after < scatter:
            return
        fall = run[-1]
        at = self.at[fall]
        day = self._when(at, fall)
        date = f"{pd.Timestamp(at).tz_convert(self.cfg.timezone):%Y-%m-%d}"
        passed = (f", passing its cleaning limit {self.bs.cleaning_limit_r:.2f} on "
                  f"{self._when(f.limit_passed)}" if f.limit_passed is not None else "")
        f.evidence.update({"r_peak": f.peak, "r_after_fall": after,
                           "fall_s": pd.Timestamp(at).timestamp(), "unlogged": 1.0})  # fmt: skip
        f.message = (
            f"{self.name} fouled: resistance ratio {f.ref:.2f} → {f.peak:.2f} from "
            f"{self._when(f.start)}{passed}; on {day} it fell back to {after:.2f} with no "
            "maintenance logged: an unlogged cleaning (or a removed restriction). Record "
            f"it with `branchwatch log SITE {self.name} --cleaned {date}`."
        )
        f.note = ""
        logger.info("%s: r fell from %.3f to %.3f on %s, no maintenance logged",
                    self.name, f.peak, after, day)  # fmt: skip
        self._end("fouling", at)
        rst = self.open.get("restriction")
        if rst is not None and after < rst.ref + rst.step / 2:
            self._end("restriction", at)
        self.first_segment = False
        self._new_segment()

    def _trend_ref(self, pts: Sequence[int]) -> float:
        """Reference level of a rise: the baseline, or the level after the last step."""
        assert self.base is not None
        if self.trend and self.trend[0] in self.base_idx:
            return self.base.r0
        return float(median(self.r[self.trend[:5]]))

    @staticmethod
    def _onset(t_list: NDArray[np.float64], y: NDArray[np.float64]) -> float:
        """Onset of a rise: the knot of the best "flat, then straight line" fit [d]."""
        t = np.asarray(t_list, dtype=np.float64)
        best, t_best = math.inf, float(t[0])
        for knot in t[:-5]:
            a = np.column_stack([np.ones_like(t), np.clip(t - knot, 0.0, None)])
            coef, *_ = np.linalg.lstsq(a, y, rcond=None)
            sse = float(np.sum((y - a @ coef) ** 2))
            if coef[1] > 0 and sse < best:
                best, t_best = sse, float(knot)
        return t_best

    def _trend_test(self) -> tuple[list[int], TheilSen] | None:
        """Test the trailing windows for a rise, over several look-backs.

        One look-back over the whole segment would see "flat, then rising": the single
        Theil–Sen line leaves a V-shaped residual that the Hamed–Rao correction reads as
        strong autocorrelation, and the test loses its power. The trailing look-backs
        catch a ramp while it is still nearly straight; each must also show a fitted rise
        of ``min_rise_r``, which keeps the multiple looks from adding false findings.
        """
        n = len(self.trend)
        ref = self._trend_ref(self.trend)
        # cheap necessary condition first: the recent windows stand clearly above the
        # reference (most windows of most branches stop here)
        if float(median(self.r[self.trend[-7:]])) - ref < 0.5 * self.cfg.min_rise_r * ref:
            return None
        for look in self.cfg.trend_lookbacks:
            if look > n and look != self.cfg.trend_lookbacks[0]:
                break
            pts = self.trend[-min(look, n) :]
            if len(pts) < min(look, self.cfg.min_trend_windows):
                continue
            t = self.day[pts]
            y = self.r[pts]
            slope, _ = sen_slope(t, y)
            if slope * (t[-1] - t[0]) < self.cfg.min_rise_r * float(median(y[:5])):
                continue
            level = float(median(y) + slope * (t[-1] - median(t)))
            assert self.base is not None
            scale = self.base.sigma_r * max(ref / self.base.r0, 1.0)
            if level - ref < max(self.cfg.min_rise_r * ref, self.cfg.min_rise_sigma * scale):
                continue
            mk = mann_kendall(y)
            if mk.z > 0 and mk.p < self.cfg.trend_alpha:
                return pts, theil_sen(t, y)
        return None

    # -- low flow (daily record) -------------------------------------------------------
    def _expire(self, t: pd.Timestamp) -> None:
        """End a low-flow finding whose condition has stayed away ``clear_after_s`` by
        *t*: it ended when its last episode did."""
        lf = self.open.get("low_flow")
        eps = None if lf is None else lf.episodes
        if lf is not None and eps is not None and eps.gone(t, self.cfg.clear_after_s):
            # its share of the time counts up to its end, not to the week after it
            lf.evidence.update(eps.evidence(eps.last_end))
            lf.message = self._low_flow_message(lf, eps, eps.last_end)
            self._end("low_flow", eps.last_end)

    def _low_flow(self, i: int) -> None:
        """One finding per low-flow condition: each run of windows whose mean flow is below
        the minimum (cleared ``low_flow_deadband`` above it) is an episode of it."""
        qmin = self.bs.min_flow_m3s
        if qmin is None:
            return
        self._expire(self.ws[i])
        q = self.col["mean_flow_m3s"][i]
        if not math.isfinite(q) or self.ws[i] in self.flagged:
            return
        lf = self.open.get("low_flow")
        if lf is None:
            if q >= qmin:
                return
            lf = _Open("low_flow", self.ws[i], self.we[i], 0.9, {}, "", episodes=Episodes())
            self._open(lf)
        eps = lf.episodes
        assert eps is not None
        clear = qmin * (1.0 + self.cfg.low_flow_deadband)
        if q < qmin or (eps.active and q < clear):
            eps.hold(self.ws[i], self.we[i], float(q))
            lf.evidence["mean_flow_m3s"] = float(q)
        else:
            eps.clear()
        lf.evidence.update({"min_flow_m3s": qmin, "clear_flow_m3s": clear,
                            "lowest_flow_m3s": eps.worst, "in_condition": float(eps.active),
                            **eps.evidence(self.we[i])})  # fmt: skip
        lf.message = self._low_flow_message(lf, eps, self.we[i], i)

    def _low_flow_message(self, lf: _Open, eps: Episodes, until: pd.Timestamp,
                          i: int | None = None) -> str:
        """The low-flow sentence, in the flow tag's unit, with the digits that show the
        comparison it states."""
        qmin, unit = float(lf.evidence["min_flow_m3s"]), self.bs.flow_unit
        q = float(lf.evidence["mean_flow_m3s"])
        (q_t, low_t), qmin_t = flow_pair([q, eps.worst], qmin, unit)
        more = eps.describe(until, self.cfg.timezone)
        lowest = f"lowest {low_t} {unit}" if len(eps.spans) > 1 or eps.worst != q else ""
        extra = "; ".join(x for x in (more, lowest) if x)
        extra = f" ({extra})" if extra else ""
        if not eps.active:
            a = self._when(eps.spans[-1][0])
            b = self._when(eps.last_end)
            return (f"{self.name}: mean flow was below its minimum {qmin_t} {unit} from {a} "
                    f"to {b}{extra}; above it since.")  # fmt: skip
        # the likely cause is whatever else is open on the branch, as it stands now
        causes = [k.replace("_", "-") for k in self.open if k != "low_flow"]
        cause = f"; likely cause: {', '.join(causes)}" if causes else ""
        day = self._when(self.ws[i] if i is not None else eps.spans[-1][0])
        if q < qmin:
            state = f"below its minimum {qmin_t} {unit}"
        else:
            state = (f"back above its minimum {qmin_t} {unit} but within "
                     f"{100 * self.cfg.low_flow_deadband:.0f} % of it")  # fmt: skip
        return f"{self.name}: mean flow {q_t} {unit} on {day}, {state}{extra}{cause}."

