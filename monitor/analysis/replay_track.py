"""What the replay's detectors share: one branch's windows as arrays, and its findings.

`BranchTrack` holds the series of one branch (r, its window times, the numeric columns),
the current `monitor.analysis.baseline.Segment`, and the book of findings: those open and those
ended. Detectors (`monitor.analysis.detect_pressure`, `monitor.analysis.detect_steps`,
`monitor.analysis.detect_fouling`, `monitor.analysis.detect_low_flow`) read the series, open and end
findings through `open` and `end`, and return the `Change` records of what they did.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from adapters.fit_record import FitHistory
from monitor.analysis.baseline import Segment, baseline_of
from monitor.analysis.findings import BranchSettings, DiagnosisSettings, Episodes, Finding
from monitor.analysis.replay_text import on_day

__all__ = ["DAY", "BranchTrack", "Change", "OpenFinding"]

logger = logging.getLogger(__name__)

DAY = pd.Timedelta(days=1)


@dataclass
class OpenFinding:
    """A finding while it is open: what the detectors update window by window."""

    kind: str
    start: pd.Timestamp
    detected: pd.Timestamp
    confidence: float
    evidence: dict[str, float]
    message: str
    ref: float = math.nan  # level before the change (for the return to normal)
    step: float = math.nan  # size of the change in the series' unit
    note: str = ""  # what the last maintenance event on it did (added to the message)
    # the numbers of that event's check (kept apart: fouling rewrites the evidence)
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


@dataclass(frozen=True)
class Change:
    """A finding opened or ended by a detector."""

    action: str  # "opened" or "ended"
    kind: str
    at: pd.Timestamp  # its start (opened) or end (ended)


class BranchTrack:
    """One branch's windows in row order and the findings on it (see the module doc)."""

    def __init__(
        self, name: str, history: FitHistory, flagged: set[pd.Timestamp],
        balance: pd.DataFrame | None, bs: BranchSettings, cfg: DiagnosisSettings,
    ) -> None:  # fmt: skip
        self.name, self.flagged, self.bs, self.cfg = name, flagged, bs, cfg
        self.balance = balance  # indexed by window_start, or None
        self.col = history.numbers  # `adapters.fit_record.HISTORY_NUMBERS`, row order
        self.ident = history.identifiable
        # a copy: back-pressure shifts edit it
        self.r: NDArray[np.float64] = np.array(history.r, dtype=np.float64)
        self.ws = list(history.window_start)
        # when each window's state began: a step inside it, else its start
        self.at = list(history.change_at)
        self.we = list(history.window_end)
        self.t0 = self.ws[0] if self.ws else pd.Timestamp(0, tz="UTC")
        # window starts in days since the first window [d]
        since = history.window_start - self.t0
        self.day: NDArray[np.float64] = np.asarray(since / DAY, dtype=np.float64)
        self.open_findings: dict[str, OpenFinding] = {}
        self.done: list[Finding] = []
        self.changes: list[Change] = []  # every open and end, in order
        self.first_segment = True
        self.s_shift = 0.0  # back-pressure change found from r, taken out of later r [Pa]
        self.seg = Segment()
        #: what a new level resets besides the segment's lists (the detectors' own state)
        self.on_restart: list[Callable[[], None]] = []

    # -- reading the windows ------------------------------------------------------------
    def when(self, t: pd.Timestamp, j: int | None = None) -> str:
        """*t* as the site's date, with the time of day when it is a step inside window
        *j* rather than the window's start."""
        return on_day(t, self.cfg.timezone, None if j is None else self.ws[j])

    def numbers(self, j: int) -> dict[str, float]:
        """The numeric columns of window j."""
        return {c: float(v[j]) for c, v in self.col.items()}

    def usable(self, i: int) -> bool:
        """Window i was not flagged by the screening and has a fitted r."""
        return self.ws[i] not in self.flagged and math.isfinite(self.r[i])

    def shift_static(self, j: int, offset: float) -> None:
        """Take a back-pressure change of ``offset`` [Pa] out of r from window j on: the
        least-squares r of ``y − c`` is r − c·Σx/Σx² (the window's sums)."""
        sx, sxx = self.col["sum_x"][j:], self.col["sum_xx"][j:]
        ok = np.isfinite(sx) & np.isfinite(sxx) & (sxx > 0)
        self.r[j:][ok] -= offset * sx[ok] / sxx[ok]
        self.s_shift += offset

    # -- the findings -------------------------------------------------------------------
    def open(self, f: OpenFinding) -> None:
        """Open finding *f* unless one of its kind is open already."""
        if f.kind not in self.open_findings:
            self.open_findings[f.kind] = f
            self.changes.append(Change("opened", f.kind, f.start))
            logger.info("%s: %s from %s", self.name, f.kind, f.start)

    def end(self, kind: str, when: pd.Timestamp) -> None:
        """End the open finding of *kind* (if any) at *when*."""
        f = self.open_findings.pop(kind, None)
        if f is not None:
            self.done.append(f.close(self.name, when))
            self.changes.append(Change("ended", kind, when))

    def since(self, n: int) -> list[Change]:
        """The changes after the first *n*."""
        return self.changes[n:]

    # -- segments -----------------------------------------------------------------------
    def new_segment(self) -> None:
        """A new baseline: the next good windows take it."""
        self.seg = Segment()
        self.restart()

    def restart(self, i: int | None = None) -> None:
        """After a change the level and the trend start again (at window *i*)."""
        self.seg.restart(i)
        for reset in self.on_restart:
            reset()

    def collect_baseline(self, i: int) -> None:
        """Window i joins the baseline windows; the baseline is taken once there are
        enough (or the commissioning period has passed)."""
        seg = self.seg
        period = self.bs.commissioning if self.first_segment else None
        if period is not None:
            lo, hi = pd.Timestamp(period[0]), pd.Timestamp(period[1])
            if lo <= self.ws[i] and self.we[i] <= hi:
                seg.base_idx.append(i)
            ready = self.ws[i] >= hi and len(seg.base_idx) >= 3
            if not ready:
                return
        else:
            seg.base_idx.append(i)
            if len(seg.base_idx) < self.cfg.baseline_windows:
                return
        idx = np.array(seg.base_idx)
        seg.base = baseline_of(idx, self.r, self.col, self.ident, self.numbers, self.cfg)
        seg.level = [j for j in seg.base_idx if self.ws[j] >= self.ws[seg.base_idx[0]]]
        seg.trend = list(seg.level)
        if period is None:  # the baseline windows of a segment are its first windows
            seg.level, seg.trend = list(seg.base_idx), list(seg.base_idx)
