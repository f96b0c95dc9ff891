"""The replay's detectors on their own: each takes a window and returns what it opened
or ended (`monitor.replay_track.Change`); the sentences come from `monitor.replay_text`.

Invented numbers on an invented branch; the rules checked are the product's (DESIGN §3:
a logged termination pressure that steps by 6 σ and at least 0.1 bar is a back-pressure
change; a window mean flow below the branch minimum is low flow). The whole replay is
checked through `monitor.diagnose` (tests/monitor/test_diagnose.py).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from adapters.fit_record import FitHistory
from monitor.detect_low_flow import LowFlowDetector
from monitor.detect_pressure import PressureDetector
from monitor.findings import BranchSettings, DiagnosisSettings
from monitor.replay_text import on_day
from monitor.replay_track import BranchTrack, Change

T0 = pd.Timestamp("2026-02-02", tz="UTC")
N = 20


def _track(end_pa: list[float], flow_m3s: list[float], *, bs: BranchSettings | None = None,
           tz: str = "UTC") -> BranchTrack:  # fmt: skip
    start = T0 + pd.to_timedelta(np.arange(len(end_pa)), unit="D")
    rng = np.random.default_rng(3)
    rows = pd.DataFrame({
        "branch": "E4-condenser",
        "window_start": start,
        "window_end": start + pd.Timedelta(days=1),
        "r": 1.0 + 0.004 * rng.standard_normal(len(end_pa)),
        "end_pressure_pa": end_pa,
        "mean_flow_m3s": flow_m3s,
        "identifiable": True,
    })  # fmt: skip
    return BranchTrack("E4-condenser", FitHistory.of(rows), set(), None,
                       bs or BranchSettings(), DiagnosisSettings(timezone=tz))


def _baseline(track: BranchTrack) -> None:
    for i in range(track.cfg.baseline_windows):
        track.collect_baseline(i)
    assert track.seg.base is not None


def test_a_step_of_the_logged_end_pressure_opens_then_ends_a_back_pressure_finding() -> None:
    # 2.00 bar gauge with ±200 Pa wiggle, then 2.60 bar from window 16, back at window 18
    wiggle = [200.0 * (-1) ** k for k in range(N)]
    end = [2.0e5 + w for w in wiggle]
    end[16] = end[17] = 2.6e5
    track = _track(end, [0.02] * N)
    _baseline(track)
    det = PressureDetector(track)
    seen = {i: det.window(i) for i in range(14, N)}
    assert seen[14] == seen[15] == []  # the recent pressures are being collected
    assert seen[16] == [Change("opened", "back_pressure", track.ws[16])]
    assert seen[17] == []  # same level: nothing new
    assert seen[18] == [Change("ended", "back_pressure", track.ws[18])]
    f = track.done[0]
    # against the median of the recent windows (2.002 and 1.998 bar): 2.000 bar
    assert f.evidence["step_pa"] == 2.6e5 - 2.0e5
    assert "moved by +0.60 bar on 2026-02-18 (from 2.00 to 2.60 bar gauge)" in f.message


def test_a_pressure_wiggle_below_the_smallest_reported_step_opens_nothing() -> None:
    # 0.08 bar is below min_bp_step_pa = 0.1 bar, however small the scatter
    end = [2.0e5] * N
    end[16:] = [2.08e5] * (N - 16)
    track = _track(end, [0.02] * N)
    _baseline(track)
    det = PressureDetector(track)
    assert [c for i in range(14, N) for c in det.window(i)] == []


def test_low_flow_opens_in_the_window_below_the_minimum_and_states_the_tags_unit() -> None:
    # minimum 72 m3/h = 0.02 m3/s; window 5 runs at 61.2 m3/h = 0.017 m3/s
    flows = [0.025] * N
    flows[5] = 0.017
    track = _track([2.0e5] * N, flows, bs=BranchSettings(min_flow_m3s=0.02))
    det = LowFlowDetector(track)
    out = {i: det.window(i) for i in range(8)}
    assert out[5] == [Change("opened", "low_flow", track.ws[5])]
    assert all(out[i] == [] for i in (0, 1, 2, 3, 4, 6, 7))
    msg = track.open_findings["low_flow"].message
    assert "below its minimum 72.0 m3/h" in msg  # 0.02 m3/s × 3600 s/h
    # a week without it (clear_after_s) ends it when its last episode did
    ended = det.expire(track.we[5] + pd.Timedelta(days=8))
    assert ended == [Change("ended", "low_flow", track.we[5])]


def test_dates_are_the_sites_with_the_time_of_day_only_inside_a_window() -> None:
    start = pd.Timestamp("2026-03-30 22:00", tz="UTC")  # 2026-03-31 00:00 in Berlin (CEST)
    assert on_day(start, "Europe/Berlin") == "2026-03-31"
    assert on_day(start, "Europe/Berlin", start) == "2026-03-31"
    inside = start + pd.Timedelta(hours=9, minutes=30)
    assert on_day(inside, "Europe/Berlin", start) == "2026-03-31 09:30"
