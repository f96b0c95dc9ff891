"""monitor.analysis.replay on its own: `BranchReplay` walks one branch's `FitHistory` window by
window, skips what the screening flagged, reads a window with a step inside it as the state
after the step, and holds a maintenance event until the fits after it judge it.

The detectors are tested one by one in tests/monitor/test_detectors.py and the whole
diagnosis through `monitor.analysis.diagnose` in tests/monitor/test_diagnose.py and
test_maintenance.py. Invented numbers on an invented branch; the rules checked are the
product's (monitor/analysis/replay.py's docstring: DESIGN §3).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from adapters.fit_record import FitHistory
from monitor.analysis.findings import BranchSettings, DiagnosisSettings, Finding
from monitor.analysis.replay import BranchReplay

T0 = pd.Timestamp("2026-03-02", tz="UTC")
DAY = pd.Timedelta(days=1)
NAME = "C3-compressor"


def _history(r: np.ndarray, **columns: object) -> pd.DataFrame:
    start = T0 + pd.to_timedelta(np.arange(len(r)), unit="D")
    return pd.DataFrame({
        "branch": NAME, "window_start": start, "window_end": start + DAY, "r": r,
        "r_low": r - 0.01, "r_high": r + 0.01, "identifiable": True, **columns,
    })  # fmt: skip


def _flat(n: int) -> np.ndarray:
    # ±0.004 window by window: scatter with no trend and no outlier
    return np.asarray(1.0 + 0.004 * (-1.0) ** np.arange(n), dtype=float)


def _run(frame: pd.DataFrame, *, flagged: set[pd.Timestamp] | None = None,
         events: pd.DataFrame | None = None) -> list[Finding]:  # fmt: skip
    ev = events if events is not None else pd.DataFrame({"time": [], "kind": []})
    replay = BranchReplay(NAME, FitHistory.of(frame), flagged or set(), None,
                          BranchSettings(), DiagnosisSettings())
    return replay.run(ev)


def test_windows_the_screening_flagged_are_not_replayed() -> None:
    # r doubles on days 30–34, the days a meter was flagged frozen: nothing opens; the
    # same rise on unflagged days opens a restriction (the test has teeth)
    r = _flat(45)
    r[30:35] = 2.0
    hist = _history(r)
    flagged = set(hist["window_start"].iloc[30:35])
    assert _run(hist, flagged=flagged) == []
    kinds = [f.kind for f in _run(hist)]
    assert "restriction" in kinds


def test_a_step_inside_a_window_is_dated_to_the_step_from_the_state_after_it() -> None:
    # the valve was throttled at 14:00 on day 30: that window's own fit mixes both states
    # (r 1.15), the fit after the step says 1.30; the later windows stay at 1.30
    r = _flat(40)
    r[30], r[31:] = 1.15, 1.30 + _flat(9) - 1.0
    tail = np.full(40, np.nan)
    tail_r = tail.copy()
    tail[30], tail_r[30] = 14 * 3600.0, 1.30
    found = _run(_history(r, tail_offset_s=tail, tail_r=tail_r, tail_r_low=tail_r - 0.01,
                          tail_r_high=tail_r + 0.01))
    (step,) = [f for f in found if f.kind == "restriction"]
    assert pd.Timestamp(step.start) == T0 + 30 * DAY + pd.Timedelta(hours=14)
    assert step.end is None
    assert step.evidence["step_r"] == pytest.approx(0.30, abs=0.01)


def test_a_cleaning_is_held_until_the_fits_after_it_show_r_back_down() -> None:
    # a restriction from day 30 (r 1.30); a cleaning logged on day 36 brings r back to
    # 1.00: the finding ends at the entry. Logged on a day with no change after it, the
    # finding stays open and its message says the entry did not bring r down.
    r = _flat(50)
    r[30:] = 1.30 + _flat(20) - 1.0
    r_back = r.copy()
    r_back[36:] = _flat(14)
    when = T0 + 36 * DAY - pd.Timedelta(hours=2)
    events = pd.DataFrame({"time": [when], "kind": ["cleaned"]})
    (ended,) = [f for f in _run(_history(r_back), events=events) if f.kind == "restriction"]
    assert pd.Timestamp(ended.end) == when
    (kept,) = [f for f in _run(_history(r), events=events) if f.kind == "restriction"]
    assert kept.end is None
    assert "The cleaning logged on 2026-04-06 had no visible effect" in kept.message
    assert kept.evidence["event_r_after"] == pytest.approx(1.30, abs=0.01)
