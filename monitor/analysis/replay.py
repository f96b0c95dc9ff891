"""One branch's fit history replayed window by window: steps, back-pressure, fouling.

`BranchReplay` walks the windows of one branch in time order and decides at each window
with only the data up to it: it keeps the maintenance events and the baseline segments
(`monitor.analysis.baseline`) and hands each window to one detector per kind —
`monitor.analysis.detect_pressure` (back-pressure from pressures),
`monitor.analysis.detect_steps` (steps: restriction, back-pressure from the shape of r,
instrument), `monitor.analysis.detect_fouling`,
`monitor.analysis.detect_low_flow` — which share the branch's series and findings
(`monitor.analysis.replay_track`); their sentences are `monitor.analysis.replay_text`.
`monitor.analysis.diagnose.diagnose` runs one replay per branch and adds the instrument and
imbalance findings, which need no replay. A window in which the analysis
found a step part-way through (`adapters.fit_record.AfterStep`) is read as the state
after the step, dated to the step (`adapters.fit_record.FitHistory`).

Causes and how they are told apart (DESIGN §3)
----------------------------------------------
* **instrument** — an ``r`` step that the header mass balance shows to be the meter's and
  not the water's. Windows whose screening flagged a tag of the branch are not replayed
  at all (`monitor.analysis.diagnose` reports them), so a frozen meter is never called fouling.
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
  hypotheses against the baseline model; from per-window sums,
  `adapters.fit_record.FitSums`);
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
  log it, and a new baseline starts (`monitor.analysis.detect_fouling`).
* **low_flow** — window mean flow below the branch minimum (the near-real-time alarm
  is `monitor.app.alarm_process`; this is its daily record). One finding per condition:
  spells that come back within ``clear_after_s`` are episodes of it
  (`monitor.analysis.findings.Episodes`); it ends when its last one did, once
  ``clear_after_s`` has passed without another.
* **imbalance** — not a per-branch matter: `monitor.analysis.diagnose`.

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
from dataclasses import dataclass, field

import pandas as pd

from adapters.fit_record import FitHistory
from monitor.analysis.detect_fouling import FoulingDetector
from monitor.analysis.detect_low_flow import LowFlowDetector
from monitor.analysis.detect_pressure import PressureDetector
from monitor.analysis.detect_steps import StepDetector
from monitor.analysis.findings import (
    CHECKED_BY_FITS,
    END_BY_EVENT,
    EVENT_WORDS,
    BranchSettings,
    DiagnosisSettings,
    Finding,
)
from monitor.analysis.replay_text import event_not_checked, event_not_effective
from monitor.analysis.replay_track import BranchTrack
from monitor.analysis.trend import median

__all__ = ["BranchReplay"]

logger = logging.getLogger(__name__)


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


class BranchReplay:
    """Walks one branch's windows in time order; see the module docstring."""

    def __init__(
        self, name: str, history: FitHistory, flagged: set[pd.Timestamp],
        balance: pd.DataFrame | None, bs: BranchSettings, cfg: DiagnosisSettings,
    ) -> None:  # fmt: skip
        self.t = BranchTrack(name, history, flagged, balance, bs, cfg)
        self.pressure = PressureDetector(self.t)
        self.steps = StepDetector(self.t)
        self.fouling = FoulingDetector(self.t)
        self.low_flow = LowFlowDetector(self.t)
        self.verify: _Verify | None = None  # a maintenance event waiting for its check

    # -- main loop -------------------------------------------------------------------
    def run(self, events: pd.DataFrame) -> list[Finding]:
        """Replay the windows with the maintenance *events* (columns ``time``, ``kind``,
        in time order): the findings, ended and still open."""
        ev = list(zip(events["time"], events["kind"], strict=True))
        k = 0
        for i in range(len(self.t.ws)):
            while k < len(ev) and ev[k][0] <= self.t.ws[i]:
                self._event(pd.Timestamp(ev[k][0]), str(ev[k][1]))
                k += 1
            if self.verify is not None:
                self._hold(i)
            else:
                self._window(i)
        if self.verify is not None:
            self._settle(at_end=True)
        if self.t.we:
            self.low_flow.expire(self.t.we[-1])
        return self.t.done + [f.close(self.t.name, None) for f in self.t.open_findings.values()]

    def _window(self, i: int, *, low_flow: bool = True) -> None:
        """Window i through the detectors: the baseline first, then each kind."""
        if self.t.usable(i):
            self.t.seg.usable.append(i)
            if self.t.seg.base is None:
                self.t.collect_baseline(i)
            else:
                self.pressure.window(i)
                self.steps.window(i)
                self.fouling.window(i)
        elif self.t.ws[i] not in self.t.flagged and self.t.seg.base is not None:
            # no usable r (too few steady samples), but a logged termination
            # pressure still shows a back-pressure step
            self.pressure.window(i)
        if low_flow:
            self.low_flow.window(i)

    # -- maintenance events ----------------------------------------------------------
    def _event(self, when: pd.Timestamp, kind: str) -> None:
        """A maintenance event: end what it ends, or hold the findings of a raised r
        until the fits after it show whether it brought r down (`_settle`)."""
        if self.verify is not None:
            self._settle()
        ends = END_BY_EVENT.get(kind, frozenset())
        checked = [f for f in sorted(ends & CHECKED_BY_FITS) if f in self.t.open_findings]
        for ended in sorted(ends - set(checked)):
            self.t.end(ended, when)
        before = self.t.seg.usable[-self.t.cfg.verify_windows :]
        if checked and before and self.t.seg.base is not None:
            self.verify = _Verify(when, kind, checked, float(median(self.t.r[before])),
                                  len(before))  # fmt: skip
            return
        for ended in checked:
            self.t.end(ended, when)
        self.t.first_segment = False
        self.t.new_segment()

    def _hold(self, i: int) -> None:
        """Window i comes after an event still being checked: kept for later."""
        v = self.verify
        assert v is not None
        v.held.append(i)
        if self.t.usable(i):
            v.usable.append(i)
        self.low_flow.window(i)
        if len(v.usable) >= self.t.cfg.verify_windows:
            self._settle()

    def _settle(self, *, at_end: bool = False) -> None:
        """Judge the held event on the usable windows after it, then replay them."""
        v = self.verify
        base = self.t.seg.base
        assert v is not None and base is not None
        self.verify = None
        word = EVENT_WORDS.get(v.kind, v.kind.replace("_", " "))
        day = self.t.when(v.when)
        if at_end and len(v.usable) < self.t.cfg.verify_windows:
            # the fits after it are too few to tell yet; the next diagnosis decides
            since = float(median(self.t.r[v.usable])) if v.usable else None
            for kind in v.checked:
                self.t.open_findings[kind].note = event_not_checked(
                    word, day, len(v.usable), self.t.cfg.verify_windows, v.r_before, since
                )
            return
        if not v.usable:  # another event came before any usable window: that one decides
            for j in v.held:
                self._window(j, low_flow=False)
            return
        r_after = float(median(self.t.r[v.usable]))
        worked = [kind for kind in v.checked if self._brought_down(kind, v, r_after)]
        for kind in worked:
            self.t.end(kind, v.when)
        for kind in v.checked:
            if kind in worked:
                continue
            f = self.t.open_findings[kind]
            # visible: beyond the day-to-day scatter of r (relative, so at r's level)
            # and a fifth of the rise; the medians either side are of a few windows only
            fall = v.r_before - r_after
            scatter = 3.0 * base.sigma_r * v.r_before / base.r0
            visible = fall >= max(scatter, 0.2 * (v.r_before - f.ref))
            f.note = event_not_effective(word, day, visible, f.ref, v.r_before, r_after)
            f.event = {"event_r_before": v.r_before, "event_r_after": r_after,
                       "event_windows_after": float(len(v.usable))}  # fmt: skip
            logger.info("%s: %s on %s did not end the %s finding (r %.3f -> %.3f)",
                        self.t.name, v.kind, day, kind, v.r_before, r_after)  # fmt: skip
        if len(worked) == len(v.checked):
            self.t.first_segment = False
            self.t.new_segment()
        for j in v.held:
            self._window(j, low_flow=False)

    def _brought_down(self, kind: str, v: _Verify, r_after: float) -> bool:
        """The fits after the event show the raised r of finding *kind* back down."""
        f = self.t.open_findings[kind]
        if kind == "restriction":
            return bool(r_after < f.ref + f.step / 2)
        rise = v.r_before - f.ref
        back = r_after - f.ref <= 0.5 * rise if rise > 0 else True
        return bool(r_after < self.t.bs.cleaning_limit_r and back)

