"""The replay's detectors on their own: each takes a window and returns what it opened
or ended (`monitor.analysis.replay_track.Change`); the sentences come from
`monitor.analysis.replay_text`.

Invented numbers on an invented branch, fixed (a ±0.004 wiggle alternating window by
window stands for the day-to-day scatter of r; the one random series names its seed);
the rules checked are the product's (DESIGN §3, thresholds of
`monitor.analysis.findings.DiagnosisSettings`): a logged termination pressure that steps by 6 σ
and at least 0.1 bar is a back-pressure change; a jump of r of 6 σ and 5 % that the next
window confirms is a step (one window out of line is an outlier fit); a slow rise that
passes the Mann–Kendall test is fouling, forecast to reach the cleaning limit at its
Theil–Sen slope; a fall back to the baseline with no maintenance logged is an unlogged
cleaning; a window mean flow below the branch minimum is low flow. No published
reference applies to those rules; the unit factors of the messages' pressures are named
where they are checked (the example site, `config/example-site.toml`, with its pressure
tags in kPa or psi). The whole replay is checked through `monitor.analysis.diagnose`
(tests/monitor/test_diagnose.py).
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Protocol

import numpy as np
import pandas as pd
import pytest
from numpy.typing import NDArray

from adapters.fit_record import FitHistory
from monitor.analysis.detect_fouling import FoulingDetector
from monitor.analysis.detect_low_flow import LowFlowDetector
from monitor.analysis.detect_pressure import PressureDetector
from monitor.analysis.detect_steps import StepDetector
from monitor.analysis.diagnose import diagnose
from monitor.analysis.findings import BranchSettings, DiagnosisSettings
from monitor.analysis.replay_text import back_pressure_changed, back_pressure_moved, on_day
from monitor.analysis.replay_track import BranchTrack, Change
from monitor.app.site_diagnosis import diagnosis_settings
from monitor.site.config import Site, parse_site
from tests.monitor.test_diagnose import make_history

EXAMPLE = Path(__file__).resolve().parents[2] / "config" / "example-site.toml"
T0 = pd.Timestamp("2026-02-02", tz="UTC")
N = 20
DAY = pd.Timedelta(days=1)


def _wiggle(n: int, size: float = 0.004) -> NDArray[np.float64]:
    """±size alternating window by window: a scatter with no trend and no outlier."""
    return np.asarray(size * (-1.0) ** np.arange(n), dtype=np.float64)


def _track(end_pa: Sequence[float] | None, flow_m3s: Sequence[float] | None = None, *,
           r: NDArray[np.float64] | None = None, bs: BranchSettings | None = None,
           tz: str = "UTC", **columns: Any) -> BranchTrack:  # fmt: skip
    n = len(r) if r is not None else len(end_pa or flow_m3s or [])
    start = T0 + pd.to_timedelta(np.arange(n), unit="D")
    if r is None:
        rng = np.random.default_rng(3)
        r = 1.0 + 0.004 * rng.standard_normal(n)
    rows = pd.DataFrame({
        "branch": "E4-condenser",
        "window_start": start,
        "window_end": start + DAY,
        "r": r,
        "end_pressure_pa": np.nan if end_pa is None else end_pa,
        "mean_flow_m3s": np.nan if flow_m3s is None else flow_m3s,
        "identifiable": True,
        **columns,
    })  # fmt: skip
    return BranchTrack("E4-condenser", FitHistory.of(rows), set(), None,
                       bs or BranchSettings(), DiagnosisSettings(timezone=tz))


def _baseline(track: BranchTrack) -> None:
    for i in range(track.cfg.baseline_windows):
        track.collect_baseline(i)
    assert track.seg.base is not None


class _Detector(Protocol):
    def window(self, i: int) -> list[Change]: ...


def _replay(track: BranchTrack, *detectors: _Detector, upto: int | None = None
            ) -> dict[int, list[Change]]:  # fmt: skip
    """The usable windows (up to window *upto*, else all) through *detectors* as
    `monitor.analysis.replay.BranchReplay` hands them on (the baseline first, then each detector in
    turn), with no maintenance logged: what each window opened or ended, for the windows
    that did."""
    out: dict[int, list[Change]] = {}
    for i in range(len(track.ws) if upto is None else upto + 1):
        if not track.usable(i):
            continue
        track.seg.usable.append(i)
        if track.seg.base is None:
            track.collect_baseline(i)
            continue
        changes = [c for d in detectors for c in d.window(i)]
        if changes:
            out[i] = changes
    return out


def _findings(track: BranchTrack) -> list[Any]:
    return track.done + [f.close(track.name, None) for f in track.open_findings.values()]


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


# -- back-pressure: more cases -----------------------------------------------------------


def test_a_pressure_step_within_six_sigma_of_a_noisy_logged_pressure_opens_nothing() -> None:
    # ±5 kPa window to window: σ = 1.4826·MAD(differences)/√2 = 1.4826·10 kPa/√2
    # = 10.5 kPa (monitor.analysis.trend.robust_sigma), so 6 σ = 63 kPa: a 0.40 bar step is inside
    # the scatter, though four times the smallest step reported
    end = list(2.0e5 + _wiggle(N, 5.0e3))
    end[16:] = [e + 0.4e5 for e in end[16:]]
    track = _track(end, [0.02] * N)
    _baseline(track)
    assert track.seg.base is not None
    assert track.seg.base.sigma_pe == pytest.approx(1.4826 * 1.0e4 / np.sqrt(2.0), rel=1e-9)
    det = PressureDetector(track)
    assert [c for i in range(14, N) for c in det.window(i)] == []


def test_a_fall_of_the_logged_end_pressure_is_stated_with_its_sign() -> None:
    end = [2.0e5] * N
    end[16:] = [1.6e5] * (N - 16)
    track = _track(end, [0.02] * N)
    _baseline(track)
    det = PressureDetector(track)
    seen = {i: det.window(i) for i in range(14, N)}
    assert seen[16] == [Change("opened", "back_pressure", track.ws[16])]
    assert all(seen[i] == [] for i in (14, 15, 17, 18, 19))  # it stays open at 1.60 bar
    f = _findings(track)[0]
    assert f.end is None and f.evidence["step_pa"] == -0.4e5
    assert "moved by -0.40 bar on 2026-02-18 (from 2.00 to 1.60 bar gauge)" in f.message


def test_the_fitted_back_pressure_counts_only_on_windows_where_it_was_identifiable() -> None:
    # no logged end pressure; the fitted static pressure s steps 0.5 bar at window 16
    s = [0.3e5] * N
    s[16:] = [0.8e5] * (N - 16)
    ident = [True] * N
    ident[16:] = [False] * (N - 16)
    blind = _track(None, [0.02] * N, s_pa=s, identifiable=ident)
    _baseline(blind)
    det = PressureDetector(blind)
    assert [c for i in range(14, N) for c in det.window(i)] == []  # s was not separable
    seen = _track(None, [0.02] * N, s_pa=s)
    _baseline(seen)
    det = PressureDetector(seen)
    assert [c for i in range(14, N) for c in det.window(i)] == [
        Change("opened", "back_pressure", seen.ws[16])]
    assert "moved by +0.50 bar on 2026-02-18 (from 0.30 to 0.80 bar gauge)" in (
        seen.open_findings["back_pressure"].message)


# -- steps of r ------------------------------------------------------------------------


def test_a_step_up_of_r_opens_a_restriction_dated_to_its_window_and_names_its_size() -> None:
    # r 1.000 ± 0.004, then +0.30 from window 20: the next window confirms it
    r = 1.0 + _wiggle(30)
    r[20:] += 0.30
    track = _track(None, r=r)
    seen = _replay(track, StepDetector(track))
    assert seen == {21: [Change("opened", "restriction", track.ws[20])]}
    (f,) = _findings(track)
    assert f.kind == "restriction" and f.end is None
    # the level before is the median of the recent windows (1.000); the size is read on
    # the confirming window, 1.30 − 0.004
    assert f.evidence["r_before"] == pytest.approx(1.0, abs=1e-9)
    assert f.evidence["step_r"] == pytest.approx(0.296, abs=1e-9)
    assert "confirmed" not in f.evidence  # named by the next window, not in its own
    assert ("resistance ratio stepped from 1.00 to 1.30 (+30 %) on 2026-02-22; most likely "
            "a restriction") in f.message  # fmt: skip


def test_a_step_on_a_window_with_a_narrow_interval_is_reported_in_its_own_window() -> None:
    # the same step with each window's r interval ±0.01: 0.30 is ≥ 12 σ and ≥ 10 %, and
    # the interval is narrower than half the jump, so window 20 reports it unconfirmed
    r = 1.0 + _wiggle(30)
    r[20:] += 0.30
    track = _track(None, r=r, r_low=r - 0.01, r_high=r + 0.01)
    det = StepDetector(track)
    assert _replay(track, det, upto=20) == {20: [Change("opened", "restriction", track.ws[20])]}
    f = track.open_findings["restriction"]
    # without the window's sums the cause is a restriction at confidence 0.5, here
    # discounted by at_once_discount = 0.8 until the next window confirms it
    assert f.evidence["confirmed"] == 0.0 and f.confidence == pytest.approx(0.4)
    assert "stepped from 1.00 to 1.30 (+30 %) on 2026-02-22" in f.message
    assert det.window(21) == []  # window 21 stays on the new level: confirmed
    assert f.evidence["confirmed"] == 1.0 and f.confidence == pytest.approx(0.5)


def test_a_single_outlier_window_opens_nothing() -> None:
    # window 21 alone stands 0.30 high; window 22 is back on the level (on the high side
    # of the wiggle, 1.004, above the level before): it does not confirm the step
    r = 1.0 + _wiggle(30)
    r[21] += 0.30
    track = _track(None, r=r)
    assert _replay(track, StepDetector(track), FoulingDetector(track)) == {}
    assert _findings(track) == []


# -- fouling -----------------------------------------------------------------------------


def test_a_steady_ramp_opens_fouling_not_a_step_with_its_onset_and_forecast() -> None:
    # r 1.000 ± 0.004 for 30 windows, then rising 0.006 per day (0.180 per month)
    n, start, slope, limit = 100, 30, 0.006, 1.5
    k = np.arange(n)
    r = 1.0 + slope * np.clip(k - start, 0, None) + _wiggle(n)
    track = _track(None, r=r, bs=BranchSettings(cleaning_limit_r=limit))
    seen = _replay(track, StepDetector(track), FoulingDetector(track))
    (opened,) = seen.items()
    i, changes = opened
    assert changes == [Change("opened", "fouling", changes[0].at)]  # never a restriction
    # a rise of min_rise_r = 0.05 takes 0.05 / 0.006 = 8.3 windows, and the trend test
    # must pass in 3 windows in a row: not before window 30 + 9 + 2 = 41
    assert 41 <= i <= 50
    (f,) = _findings(track)
    # the onset is a knot inside the look-back that found the rise (10 windows when the
    # ramp is that young): within a few windows of its true start
    assert abs(pd.Timestamp(f.start) - track.ws[start]) <= 4 * DAY
    assert f.evidence["slope_per_day"] == pytest.approx(slope, rel=0.02)
    assert "is fouling: resistance ratio 1.00 → 1.4" in f.message
    assert "rising 0.180 per month" in f.message  # 0.006 × 30
    # by hand: the last window (99) stands at 1 + 0.006·(99 − 30) = 1.414; the limit
    # 1.5 is (1.5 − 1.414) / 0.006 = 14.3 days after its start, 2026-05-26 08:00
    last = 1.0 + slope * (n - 1 - start)
    due = track.ws[n - 1] + (limit - last) / slope * DAY
    g = re.search(r"reaches the cleaning limit 1\.50 about (\S+) \(between (\S+) and (\S+)\)",
                  f.message)
    assert g, f.message
    eta, low, high = (pd.Timestamp(x, tz="UTC") for x in g.groups())
    # the wiggle moves the fitted level by up to 0.004, 0.7 day at this slope
    assert abs(eta - due) <= DAY
    assert low <= eta <= high


def test_a_flat_noisy_series_opens_nothing() -> None:
    # a year of r = 1 ± 1.5 % white scatter (seed 11): no step, no trend
    r = 1.0 + 0.015 * np.random.default_rng(11).standard_normal(365)
    track = _track(None, r=r)
    assert _replay(track, StepDetector(track), FoulingDetector(track)) == {}


def test_a_fall_after_fouling_with_no_maintenance_ends_it_as_an_unlogged_cleaning() -> None:
    # the ramp above up to window 89 (r 1.35), back at 1.000 ± 0.004 from window 90
    n, start, slope = 110, 30, 0.006
    k = np.arange(n)
    r = 1.0 + slope * np.clip(k - start, 0, None) + _wiggle(n)
    r[90:] = 1.0 + _wiggle(n)[90:]
    track = _track(None, r=r)
    seen = _replay(track, StepDetector(track), FoulingDetector(track))
    # it ends at the fall, once verify_windows = 3 windows (90, 91, 92) stand in the
    # lower half of the rise; the step detector opens nothing for a fall
    first = min(seen)
    assert [c.action + " " + c.kind for c in seen[first]] == ["opened fouling"]
    assert seen == {first: seen[first], 92: [Change("ended", "fouling", track.ws[90])]}
    (f,) = _findings(track)
    assert f.kind == "fouling" and pd.Timestamp(f.end) == track.ws[90]
    assert f.evidence["unlogged"] == 1.0
    # the peak: the median of the five windows before the fall, centred on window 87,
    # 1 + 0.006·57 = 1.342 (± the wiggle)
    assert f.evidence["r_peak"] == pytest.approx(1.342, abs=0.005)
    assert f.evidence["r_after_fall"] == pytest.approx(1.0, abs=0.005)
    assert ("on 2026-05-03 it fell back to 1.00 with no maintenance logged: an unlogged "
            "cleaning") in f.message  # fmt: skip
    assert "--cleaned 2026-05-03" in f.message


# -- pressures in the site's units --------------------------------------------------------
# 1 bar = 100 kPa exactly (SI Brochure, 9th ed., table 8); 1 psi = 6894.757 Pa and the
# standard atmosphere 101 325 Pa (NIST SP 811, appendix B.8).


def _example_site(units: dict[str, str]) -> Site:
    """The example site with the pressure tags *units* names (tag → unit) in that unit
    instead of bar: the tags' nominal values converted with them."""
    text = EXAMPLE.read_text(encoding="utf-8")
    per_bar = {"kPa": 100.0, "psi": 1.0e5 / 6894.757}
    for tag, unit in units.items():
        def swap(m: re.Match[str], unit: str = unit) -> str:
            nominal = f", nominal = {float(m[2]) * per_bar[unit]:g}" if m[2] else ""
            return f'tag = "{m[1]}", unit = "{unit}"{nominal}'
        text = re.sub(rf'tag = "({re.escape(tag)})", unit = "bar"(?:, nominal = ([\d.]+))?',
                      swap, text)
    doc = tomllib.loads(text)
    doc.pop("store", None)
    doc.pop("source", None)
    return parse_site(doc, path=EXAMPLE)


def test_each_branch_states_pressures_in_its_end_pressure_tags_unit_else_the_headers() -> None:
    units = {b: s.pressure_unit for b, s in diagnosis_settings(_example_site({})).branches.items()}
    assert set(units.values()) == {"bar"}  # the example site's tags are all in bar
    site = _example_site({"PT-100": "psi", "PT-150": "kPa", "PT-410": "kPa"})
    units = {b: s.pressure_unit for b, s in diagnosis_settings(site).branches.items()}
    assert units == {
        "B1-reactor": "kPa", "B2-compressor": "kPa", "B6-chiller": "kPa",  # PT-150
        "B4-process": "kPa",  # PT-410, its held header
        "B3-quench": "psi", "B5-spray": "psi",  # a tank and an open end: the header's PT-100
    }  # fmt: skip


def test_a_site_with_pressure_tags_in_kpa_gets_its_back_pressure_finding_in_kpa() -> None:
    site = _example_site({"PT-100": "kPa", "PT-150": "kPa", "PT-410": "kPa"})
    # B4-process ends at the held header PT-410, logged: 2.20 bar gauge, 2.45 from day 60
    hist = make_history(120, seed=5, branch="B4-process", logged_end_pressure=True)
    hist["end_pressure_pa"] = np.where(np.arange(120) >= 60, 2.45e5, 2.2e5)
    found = diagnose(hist, settings=diagnosis_settings(site), now=hist["window_end"].max())
    (bp,) = [f for f in found if f.kind == "back_pressure"]
    assert bp.evidence["step_pa"] == pytest.approx(0.25e5)
    day = f"{pd.Timestamp(hist['window_start'][60]).tz_convert(site.timezone):%Y-%m-%d}"
    # 0.25 bar = 25 kPa, 2.20 bar = 220 kPa: to 1 kPa, no decimals
    assert (f"B4-process: the back-pressure at its end moved by +25 kPa on {day} "
            "(from 220 to 245 kPa gauge).") == bp.message  # fmt: skip


def test_pressures_in_psi_and_in_an_absolute_unit() -> None:
    # 25 kPa = 3.626 psi, to 1 kPa = 0.145 psi: one decimal
    assert "changed by about +3.6 psi on 2026-02-18;" in back_pressure_changed(
        "E4-condenser", 2.5e4, "2026-02-18", 1.0, 1.1, unit="psi")
    # 2.20 bar gauge = 2.20 + 1.01325 = 3.21 bara; a difference is in bar, neither
    # gauge nor absolute, and bara says absolute itself
    assert back_pressure_moved("E4-condenser", 0.25e5, "2026-02-18", 2.2e5, 2.45e5,
                               unit="bara") == (
        "E4-condenser: the back-pressure at its end moved by +0.25 bar on 2026-02-18 "
        "(from 3.21 to 3.46 bara).")  # fmt: skip


def test_a_branch_setting_refuses_a_pressure_unit_that_is_not_one() -> None:
    with pytest.raises(ValueError, match="pressure_unit must be a pressure unit, got 'm3/h'"):
        BranchSettings(pressure_unit="m3/h")
