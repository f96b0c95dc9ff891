"""Tests of monitor.analysis.diagnose on synthetic fit histories.

The little generator below makes, per daily window, 96 samples (every 15 min) of a
branch: a day/night flow swing, the clean dynamic ΔP ``x = a·Q²``, and the observed
``y = r·x + (s_true − s_configured) + noise``. ``r`` carries day-to-day AR(1) scatter
(the unmodelled day-to-day variation of a real branch), and the window's ``r`` is the
least-squares fit with the back-pressure held at its configured value, as the fit does
when the termination pressure is not logged. It is a stand-in for the site simulator.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pytest

from monitor.analysis.diagnose import (
    BranchSettings,
    DiagnosisSettings,
    Finding,
    diagnose,
)

T0 = datetime(2025, 1, 1, tzinfo=UTC)
SAMPLES = 96


@dataclass(frozen=True)
class Fault:
    kind: str  # "ramp", "step", "bp_step"
    day: float  # onset [d]
    size: float  # ramp: r reached at day+length; step: relative rise; bp_step: [Pa]
    length: float = 0.0  # ramp duration [d]


def make_history(
    days: int,
    *,
    seed: int,
    branch: str = "CW-3",
    sigma: float = 0.015,
    rho: float = 0.6,
    faults: tuple[Fault, ...] = (),
    logged_end_pressure: bool = False,
    seasonal_error: float = 0.0,
    dp_design_pa: float = 1.0e5,
    tails: bool = False,
) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    tk = np.arange(days)[:, None] + (np.arange(SAMPLES)[None, :] + 0.5) / SAMPLES
    q0 = 0.04  # design flow [m^3/s]
    # day/night load swing and a seasonal one (more cooling in summer) [m^3/s]
    q = (
        q0
        * (0.8 + 0.2 * np.sin(2 * np.pi * (tk - 0.3)))
        * (1 + 0.1 * np.sin(2 * np.pi * tk / 365.0))
    )
    x = dp_design_pa * (q / q0) ** 2  # clean dynamic ΔP [Pa]
    eps = np.empty(days)
    eps[0] = rng.normal(0, sigma)
    for d in range(1, days):
        eps[d] = rho * eps[d - 1] + rng.normal(0, sigma * np.sqrt(1 - rho**2))
    r = np.ones_like(tk) * (1 + eps[:, None]) * (1 + seasonal_error * np.sin(2 * np.pi * tk / 365))
    s = np.zeros_like(tk)  # true back-pressure minus configured [Pa]
    for f in faults:
        if f.kind == "ramp":
            frac = np.clip((tk - f.day) / f.length, 0.0, 1.0)
            r = r * (1 + (f.size - 1) * frac)
        elif f.kind == "step":
            r = r * np.where(tk >= f.day, 1 + f.size, 1.0)
        elif f.kind == "bp_step":
            s = s + np.where(tk >= f.day, f.size, 0.0)
    end_pressure = 3.0e4 + s
    if logged_end_pressure:
        s = np.zeros_like(s)  # the fit knows the logged pressure: y carries no offset
    y = r * x + s + rng.normal(0, 1000.0, tk.shape)
    r_fit = (y * x).sum(1) / (x * x).sum(1)
    start = pd.Timestamp(T0) + pd.to_timedelta(np.arange(days), unit="D")
    hist = pd.DataFrame(
        {
            "branch": branch,
            "window_start": start,
            "window_end": start + pd.Timedelta(days=1),
            "r": r_fit,
            "samples": SAMPLES,
            "mean_flow_m3s": q.mean(1),
            "sum_w": float(SAMPLES),
            "sum_x": x.sum(1),
            "sum_y": y.sum(1),
            "sum_xx": (x * x).sum(1),
            "sum_xy": (x * y).sum(1),
            "sum_yy": (y * y).sum(1),
        }
    )
    if logged_end_pressure:
        hist["end_pressure_pa"] = end_pressure.mean(1)
    if tails:
        _add_tails(hist, tk, x, y, faults)
    return hist


def _add_tails(hist: pd.DataFrame, tk: np.ndarray, x: np.ndarray, y: np.ndarray,
               faults: tuple[Fault, ...]) -> None:
    """What `monitor.analysis.window` adds to a window a step came part-way through: the fit of
    the samples after the step (``tail_*``; here the step time is known)."""
    for f in faults:
        d = int(np.floor(f.day))
        after = tk[d] >= f.day
        if f.kind == "ramp" or after.all() or after.sum() < 6:
            continue
        xt, yt = x[d][after], y[d][after]
        r_t = float((xt * yt).sum() / (xt * xt).sum())
        for col, value in {
            "tail_offset_s": (f.day - d) * 86400.0, "tail_r": r_t,
            "tail_r_low": r_t - 0.01, "tail_r_high": r_t + 0.01,
            "tail_samples": float(after.sum()), "tail_sum_w": float(after.sum()),
            "tail_sum_x": xt.sum(), "tail_sum_y": yt.sum(), "tail_sum_xx": (xt * xt).sum(),
            "tail_sum_xy": (xt * yt).sum(), "tail_sum_yy": (yt * yt).sum(),
        }.items():
            if col not in hist.columns:
                hist[col] = np.nan
            hist.loc[d, col] = value


def run(hist: pd.DataFrame, **kw: object) -> list[Finding]:
    now = hist["window_end"].max()
    return diagnose(hist, now=now, **kw)  # type: ignore[arg-type]


def days_after_t0(t: datetime) -> float:
    return (pd.Timestamp(t) - pd.Timestamp(T0)) / pd.Timedelta(days=1)


def test_clean_branch_gives_nothing() -> None:
    assert run(make_history(365, seed=1)) == []


def test_seasonal_temperature_alone_gives_nothing() -> None:
    # The model carries temperature, so r stays flat; a 0.5 % seasonal model error and
    # a ±10 % seasonal load swing must not read as fouling.
    assert run(make_history(365, seed=2, seasonal_error=0.005)) == []


@pytest.mark.parametrize(("seed", "length"), [(3, 60), (4, 120), (5, 200)])
def test_fouling_ramp_found_before_1_25_with_forecast(seed: int, length: float) -> None:
    onset = 60.0
    hist = make_history(300, seed=seed, faults=(Fault("ramp", onset, 1.5, length),))
    fouling = [f for f in run(hist) if f.kind == "fouling"]
    assert len(fouling) == 1, run(hist)
    f = fouling[0]
    # issue 4 goal: found before r passes 1.25 (halfway up a linear ramp to 1.5)
    r_at_detect = 1 + 0.5 * (days_after_t0(f.detected) - onset) / length
    assert r_at_detect < 1.25
    assert abs(days_after_t0(f.start) - onset) < 0.35 * length
    # The forecast made at detection: the limit 1.5 is reached at onset + length.
    cut = hist[hist["window_end"] <= pd.Timestamp(f.detected)]
    at_detect = next(g for g in run(cut) if g.kind == "fouling")
    eta = days_after_t0(at_detect.detected) - 1 + at_detect.evidence["days_to_limit"]
    assert abs(eta - (onset + length)) < 0.3 * length
    assert at_detect.evidence["days_to_limit_low"] <= at_detect.evidence["days_to_limit"]
    assert "cleaning limit" in at_detect.message


@pytest.mark.parametrize("seed", [6, 7, 8, 9])
def test_restriction_step_found_within_a_day(seed: int) -> None:
    day = 100.0 + (seed % 4) * 0.2  # steps part-way through the morning
    hist = make_history(160, seed=seed, faults=(Fault("step", day, 0.30),))
    found = run(hist)
    assert [f.kind for f in found] == ["restriction"], found
    f = found[0]
    # issue 4 goal: within 1 day, read as "by the end of the first whole window after the
    # step". Without an r interval on the windows a jump is named once the next window
    # confirms it (an outlier fit is not a step); a window the step falls part-way
    # through cannot tell the cause, and the next one does.
    assert days_after_t0(f.detected) <= np.floor(day) + 2.0
    assert np.floor(day) <= days_after_t0(f.start) <= day
    assert f.evidence["step_sigma"] > 6


@pytest.mark.parametrize(("seed", "day"), [(30, 100.0), (31, 100.5), (32, 100.93)])
def test_restriction_step_with_narrow_fit_interval_named_by_the_next_window(
    seed: int, day: float
) -> None:
    # Fits as precise as the site simulator's (day-to-day scatter 0.2 %, below the σ floor)
    # with their own r interval: a +30 % step at the start of a window is named in that
    # window and confirmed by the next; part-way through one (the window then fits neither
    # cause cleanly), by the end of the next window (issue 4 goal: within 1 day). The
    # start is never after the step.
    hist = make_history(160, seed=seed, sigma=0.002, faults=(Fault("step", day, 0.30),))
    hist = hist.assign(r_low=hist["r"] - 0.005, r_high=hist["r"] + 0.005)
    found = run(hist)
    assert [f.kind for f in found] == ["restriction"], found
    f = found[0]
    assert days_after_t0(f.detected) <= np.floor(day) + 2.0
    assert np.floor(day) <= days_after_t0(f.start) <= day
    if day - np.floor(day) < 0.1:  # nearly the whole window after the step
        assert days_after_t0(f.detected) == np.floor(day) + 1.0
        assert f.evidence["confirmed"] == 1.0  # the next window stayed up
        cut = hist[hist["window_end"] <= pd.Timestamp(f.detected)]
        first = run(cut)
        assert [(g.kind, g.start) for g in first] == [(f.kind, f.start)]  # same key
        assert first[0].evidence["confirmed"] == 0.0
        assert first[0].confidence < f.confidence


@pytest.mark.parametrize(("kind", "fault"), [
    ("restriction", Fault("step", 80.62, 0.30)),
    ("back_pressure", Fault("bp_step", 80.71, 2.5e4)),
    ("back_pressure", Fault("bp_step", 80.55, -2.5e4)),
])  # fmt: skip
def test_step_inside_a_window_is_named_in_that_window_from_its_tail(
    kind: str, fault: Fault
) -> None:
    # The analysis found the step part-way through the window and fitted the samples
    # after it (the tail): the finding is detected at the end of that same window (within
    # a day of the step: issue 4 goal) and starts at the step, not at midnight.
    hist = make_history(120, seed=41, sigma=0.002, faults=(fault,), tails=True)
    hist = hist.assign(r_low=hist["r"] - 0.005, r_high=hist["r"] + 0.005)
    found = run(hist)
    assert [f.kind for f in found] == [kind], found
    assert days_after_t0(found[0].detected) == np.floor(fault.day) + 1.0
    assert days_after_t0(found[0].start) == pytest.approx(fault.day, abs=2.0 / 86400)
    # the message gives the step's date and time in the site's zone
    local = run(hist, settings=DiagnosisSettings(timezone="Europe/Berlin"))[0]
    when = pd.Timestamp(found[0].start).tz_convert("Europe/Berlin")
    assert f"{when:%Y-%m-%d %H:%M}" in local.message, local.message
    # without the tail the same history waits for the next window
    plain = run(hist.drop(columns=[c for c in hist.columns if c.startswith("tail_")]))
    assert [f.kind for f in plain] == [kind]
    assert days_after_t0(plain[0].detected) == np.floor(fault.day) + 2.0


def test_fouling_that_levelled_off_stays_a_sure_finding() -> None:
    # A deposit that stopped growing is still there: long after the ramp ended, the open
    # finding keeps its confidence and says r no longer rises, rather than fading with
    # the trend test of a flat stretch.
    hist = make_history(400, seed=12, faults=(Fault("ramp", 60.0, 1.5, 60.0),))
    found = [f for f in run(hist) if f.kind == "fouling"]
    assert len(found) == 1 and found[0].end is None
    f = found[0]
    assert f.confidence > 0.9
    assert "has fouled" in f.message and "not rising" in f.message, f.message
    assert f.evidence["r_recent"] == pytest.approx(1.5, abs=0.05)
    # while it still climbed, the message said so
    during = [g for g in run(hist[hist["window_end"] <= pd.Timestamp(T0) + pd.Timedelta(days=110)])
              if g.kind == "fouling"]
    assert during and "is fouling" in during[0].message and "rising" in during[0].message


@pytest.mark.parametrize(("seed", "length"), [(33, 60.0), (34, 30.0)])
def test_fast_fouling_ramp_on_precise_fits_is_never_a_step(seed: int, length: float) -> None:
    # Daily increments of 0.8–1.7 % on fits with 0.2 % scatter (the σ floor is 0.4 %):
    # each window is several σ above the one before, yet a smooth ramp is fouling, never
    # a restriction or a back-pressure change, and is found before r passes 1.25
    # (issue 4 goal).
    onset = 50.3
    hist = make_history(200, seed=seed, sigma=0.002,
                        faults=(Fault("ramp", onset, 1.5, length),))  # fmt: skip
    hist = hist.assign(r_low=hist["r"] - 0.005, r_high=hist["r"] + 0.005)
    found = run(hist)
    assert [f.kind for f in found] == ["fouling"], found
    r_at_detect = 1 + 0.5 * (days_after_t0(found[0].detected) - onset) / length
    assert r_at_detect < 1.25


@pytest.mark.parametrize(
    ("seed", "day", "dp_design"),
    [(10, 100.0, 1e5), (11, 100.2, 1e5), (12, 100.7, 1e5), (19, 100.3, 2.8e5)],
)
def test_back_pressure_step_unlogged_is_not_a_restriction(
    seed: int, day: float, dp_design: float
) -> None:
    # 0.2 bar: issue 4 goal size. On a 2.8 bar branch it reads as only +7 % in r, about
    # 4σ: the constant-offset test finds it, not the jump of r.
    hist = make_history(160, seed=seed, faults=(Fault("bp_step", day, 2.0e4),),
                        dp_design_pa=dp_design)  # fmt: skip
    found = run(hist)
    assert [f.kind for f in found] == ["back_pressure"], found
    # a step part-way through a window is decided on the next one (see the restriction
    # test)
    assert days_after_t0(found[0].detected) <= np.floor(day) + 3.0
    assert abs(days_after_t0(found[0].start) - day) < 1.0  # within a window
    assert found[0].evidence["static_offset_pa"] == pytest.approx(2.0e4, rel=0.15)


def test_back_pressure_step_logged() -> None:
    hist = make_history(160, seed=13, faults=(Fault("bp_step", 100.3, 2.0e4),),
                        logged_end_pressure=True)  # fmt: skip
    found = run(hist)
    assert [f.kind for f in found] == ["back_pressure"], found
    assert days_after_t0(found[0].detected) - 100.3 <= 1.0
    assert found[0].evidence["step_pa"] == pytest.approx(2.0e4 * 0.7, rel=0.2)


def test_cleaning_ends_fouling_and_resets_baseline() -> None:
    hist = make_history(300, seed=14, faults=(Fault("ramp", 40.0, 1.5, 90.0),))
    # cleaning on day 150: the generator's r after it returns to clean
    r = hist["r"].to_numpy().copy()
    day = np.arange(len(r))
    clean_r = make_history(300, seed=14)["r"].to_numpy()
    r[day >= 150] = clean_r[day >= 150]
    hist = hist.assign(r=r).drop(columns=[c for c in hist.columns if c.startswith("sum_")])
    events = pd.DataFrame(
        {"branch": ["CW-3"], "kind": ["cleaned"], "time": [pd.Timestamp(T0) + timedelta(150)]}
    )
    found = run(hist, maintenance=events)
    assert [f.kind for f in found] == ["fouling"], found
    assert found[0].end == T0 + timedelta(150)


def test_frozen_meter_is_instrument_never_fouling() -> None:
    hist = make_history(200, seed=15)
    # a frozen flow meter: the fit sees a constant flow while the pressure moves; make
    # its windows rise like fouling to prove they are excluded
    frozen = (hist.index >= 120) & (hist.index < 170)
    hist.loc[frozen, "r"] = np.linspace(1.0, 1.6, int(frozen.sum()))
    screening = pd.DataFrame(
        {
            "branch": "CW-3",
            "window_start": hist["window_start"],
            "window_end": hist["window_end"],
            "tag": "FT-203",
            "frozen": np.where(frozen, 96, 0),
            "out_of_range": 0,
            "spikes": 0,
            "samples": 96,
        }
    )
    found = run(hist, screening=screening)
    assert [f.kind for f in found] == ["instrument"], found
    assert days_after_t0(found[0].start) == 120
    assert found[0].end is not None and days_after_t0(found[0].end) == 170
    assert "FT-203" in found[0].message


def test_lone_out_of_range_sample_is_no_instrument_fault() -> None:
    # One reading of -41 m3/h in a day (a spike through zero, screened out) is not a sick
    # meter; a meter that keeps reading beyond its range for a while is.
    hist = make_history(60, seed=16)
    base = {"branch": "CW-3", "window_start": hist["window_start"],
            "window_end": hist["window_end"], "tag": "FT-203", "frozen": 0, "spikes": 0,
            "samples": 96}  # fmt: skip
    lone = pd.DataFrame({**base, "out_of_range": np.where(hist.index == 40, 1, 0)})
    assert run(hist, screening=lone) == []
    stuck = pd.DataFrame({**base, "out_of_range": np.where(hist.index == 40, 30, 0)})
    assert [f.kind for f in run(hist, screening=stuck)] == ["instrument"]


def test_spiky_meter_is_reported_when_it_stays_spiky() -> None:
    # 12 spikes in 96 samples on one day is a busy control loop; on two days in a row
    # the transmitter is glitching: reported at the end of the second day.
    hist = make_history(60, seed=17)
    base = {"branch": "CW-3", "window_start": hist["window_start"],
            "window_end": hist["window_end"], "tag": "FT-203", "frozen": 0,
            "out_of_range": 0, "samples": 96}  # fmt: skip
    one = pd.DataFrame({**base, "spikes": np.where(hist.index == 40, 12, 0)})
    assert run(hist, screening=one) == []
    two = pd.DataFrame({**base, "spikes": np.where(hist.index.isin([40, 41]), 12, 0)})
    found = run(hist, screening=two)
    assert [f.kind for f in found] == ["instrument"] and "spikes" in found[0].message
    assert days_after_t0(found[0].start) == 40 and days_after_t0(found[0].detected) == 42


def test_meter_step_with_balance_is_instrument() -> None:
    # The meter reads 12 % low from day 90: the fitted r rises by 1/0.88² ≈ +29 %, and
    # Σ branch − total moves by the meter's change (a real restriction would not move it).
    hist = make_history(130, seed=16)
    bad = hist.index >= 90
    hist.loc[bad, "r"] = hist.loc[bad, "r"] / 0.88**2
    hist.loc[bad, "mean_flow_m3s"] = hist.loc[bad, "mean_flow_m3s"] * 0.88
    hist = hist.drop(columns=[c for c in hist.columns if c.startswith("sum_")])
    residual = np.where(bad, -0.12 * hist["mean_flow_m3s"] / 0.88, 0.0)
    balance = pd.DataFrame(
        {
            "window_start": hist["window_start"],
            "window_end": hist["window_end"],
            "residual_m3s": residual + np.random.default_rng(1).normal(0, 2e-4, len(hist)),
            "uncertainty_m3s": 1.5e-3,
        }
    )
    kinds = sorted(f.kind for f in run(hist, balance=balance))
    assert kinds == ["imbalance", "instrument"]


def test_incremental_runs_agree() -> None:
    hist = make_history(200, seed=17, faults=(Fault("step", 80.5, 0.3),
                                              Fault("ramp", 120.0, 1.5, 80.0)))  # fmt: skip
    keys_seen: dict[tuple[str, str, datetime], datetime] = {}
    for d in range(60, 201, 7):
        for f in run(hist.iloc[:d]):
            key = (f.branch, f.kind, f.start)
            keys_seen.setdefault(key, f.detected)
            assert keys_seen[key] == f.detected
    final = {(f.branch, f.kind, f.start) for f in run(hist)}
    assert final == set(keys_seen)


def test_low_flow_and_json() -> None:
    hist = make_history(60, seed=18, faults=(Fault("step", 40.2, 0.6),))
    hist.loc[hist.index >= 40, "mean_flow_m3s"] *= 0.75
    settings = DiagnosisSettings(branches={"CW-3": BranchSettings(min_flow_m3s=0.030)})
    found = run(hist, settings=settings)
    kinds = {f.kind for f in found}
    assert kinds == {"restriction", "low_flow"}
    low = next(f for f in found if f.kind == "low_flow")
    assert "restriction" in low.message
    doc = json.loads(json.dumps([f.to_json_dict() for f in found]))
    assert {"branch", "kind", "start", "detected", "end", "confidence",
            "evidence", "message"} <= set(doc[0])  # fmt: skip  # DESIGN §5: "at least"
    assert {d["priority"] for d in doc} <= {"low", "medium", "high"}
    assert doc[0]["start"].endswith("+00:00")


def test_bad_input_names_the_argument() -> None:
    hist = make_history(20, seed=1)
    with pytest.raises(ValueError, match="history lacks"):
        diagnose(hist.drop(columns="r"), now=T0)
    with pytest.raises(ValueError, match="now"):
        diagnose(hist, now=datetime(2025, 2, 1))
    with pytest.raises(ValueError, match="cleaning_limit_r"):
        BranchSettings(cleaning_limit_r=0.9)
    with pytest.raises(ValueError, match="Europe/Fenwick"):
        DiagnosisSettings(timezone="Europe/Fenwick")
    empty = pd.DataFrame({"branch": [], "window_start": [], "window_end": [], "r": []})
    assert diagnose(empty, now=T0) == []


def test_false_findings_on_clean_branch_years() -> None:
    # issue 4 goal: at most 0.5 false findings per clean branch-year. 20 branch-years,
    # σ 1–2 %, AR(1) rho 0.3–0.7 day to day.
    rng = np.random.default_rng(2026)
    false = 0
    for k in range(20):
        hist = make_history(365, seed=100 + k, sigma=float(rng.uniform(0.01, 0.02)),
                            rho=float(rng.uniform(0.3, 0.7)),
                            seasonal_error=float(rng.uniform(0, 0.005)))  # fmt: skip
        false += len(run(hist))
    rate = false / 20
    print(f"false findings per clean branch-year: {rate:.2f}")
    assert rate <= 0.5


def test_back_pressure_step_in_fitted_s() -> None:
    # Wide flow range: the fit separates s from r (identifiable); the step is in s, r flat.
    hist = make_history(160, seed=20)
    rng = np.random.default_rng(20)
    s = 3.0e4 + rng.normal(0, 800.0, len(hist)) + np.where(hist.index >= 101, 2.5e4, 0.0)
    hist = hist.assign(s_pa=s, identifiable=True)
    found = run(hist)
    assert [f.kind for f in found] == ["back_pressure"], found
    assert days_after_t0(found[0].start) == 101
    assert found[0].evidence["step_pa"] == pytest.approx(2.5e4, rel=0.1)


def test_commissioning_period_sets_the_baseline() -> None:
    # A branch fouling from day 30 of the history, commissioned clean over days 0–20.
    hist = make_history(200, seed=21, faults=(Fault("ramp", 30.0, 1.6, 90.0),))
    period = (T0, T0 + timedelta(days=20))
    settings = DiagnosisSettings(default_branch=BranchSettings(commissioning=period))
    found = run(hist, settings=settings)
    assert [f.kind for f in found] == ["fouling"]
    assert found[0].evidence["r_baseline"] == pytest.approx(1.0, abs=0.03)


def test_header_instrument_flags_exclude_every_branch() -> None:
    # The header pressure transmitter froze: every branch's fit is suspect those days.
    a = make_history(120, seed=22, branch="CW-1")
    b = make_history(120, seed=23, branch="CW-2")
    bad = (a.index >= 60) & (a.index < 80)
    a.loc[bad, "r"] = 1.5
    b.loc[bad, "r"] = 0.6
    screening = pd.DataFrame(
        {"branch": "header", "window_start": a["window_start"], "window_end": a["window_end"],
         "tag": "PT-100", "frozen": np.where(bad, 96, 0), "out_of_range": 0, "spikes": 0}
    )  # fmt: skip
    found = run(pd.concat([a, b], ignore_index=True), screening=screening)
    assert [(f.branch, f.kind) for f in found] == [("header", "instrument")]
