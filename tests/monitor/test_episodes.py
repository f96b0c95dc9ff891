"""One finding per condition (issue 8 part 2) and the fouling life cycle (part 3).

Histories come from the synthetic fit generator of `tests.monitor.test_diagnose`
(`make_history`: daily windows, AR(1) day-to-day scatter of r). The expected figures are
worked out by hand from the days set below; the rules they check (a week to clear, a
cleaning limit, a fall back to the baseline) are the product's own (issue 8), not a
published reference.
"""

from __future__ import annotations

from datetime import timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from adapters.base import open_store
from adapters.fit_record import fits_of
from monitor.analysis.diagnose import BranchSettings, DiagnosisSettings, Finding, diagnose
from monitor.analysis.findings import flow_pair
from monitor.app.cli import main
from monitor.app.morning_report import write_report
from monitor.app.site_diagnosis import _finding_row, diagnose_site
from monitor.site.config import load_site
from tests.monitor.test_diagnose import T0, Fault, days_after_t0, make_history, run

EXAMPLE_SITE = Path(__file__).resolve().parents[2] / "config" / "example-site.toml"
MIN_FLOW = 0.030  # [m^3/s]; make_history's mean flow is about 0.032 [m^3/s]


def _low_days(hist: pd.DataFrame, days: list[range], flow: float = 0.025,
              worst: float = 0.020) -> pd.DataFrame:
    hist = hist.copy()
    for span in days:
        hist.loc[hist.index.isin(list(span)), "mean_flow_m3s"] = flow
    hist.loc[hist.index == days[0].start + 1, "mean_flow_m3s"] = worst  # the worst day
    return hist


def _settings(**kw: object) -> DiagnosisSettings:
    return DiagnosisSettings(branches={"CW-3": BranchSettings(min_flow_m3s=MIN_FLOW)},
                             **kw)  # type: ignore[arg-type]


def _only(found: list[Finding], kind: str) -> list[Finding]:
    return [f for f in found if f.kind == kind]


def test_returning_low_flow_is_one_finding_with_episodes() -> None:
    # Low on days 40-44, 47-49 and 52-55: gaps of 2 and 2 days, under the week of
    # clear_after, so one finding of 3 episodes, 12 days in the condition out of the 16
    # from day 40 to day 56; ended at day 56 once a week passed without it. Low again on
    # day 100, 44 days later: a new finding.
    hist = _low_days(make_history(200, seed=21),
                     [range(40, 45), range(47, 50), range(52, 56), range(100, 101)])
    low = _only(run(hist, settings=_settings()), "low_flow")
    assert len(low) == 2, low
    f = low[0]
    assert days_after_t0(f.start) == 40 and days_after_t0(f.detected) == 41
    assert f.end is not None and days_after_t0(f.end) == 56
    assert f.evidence["episodes"] == 3
    assert f.evidence["share_of_time"] == pytest.approx(12 / 16)
    assert f.evidence["lowest_flow_m3s"] == pytest.approx(0.020)
    assert "3 episodes since 2025-02-10, 75 % of the time" in f.message, f.message
    assert "lowest 72.0 m3/h" in f.message  # 0.020 m^3/s = 72.0 m^3/h
    assert days_after_t0(low[1].start) == 100 and low[1].evidence["episodes"] == 1


def test_clear_after_is_the_setting() -> None:
    # With two days to clear, the gaps of two days (45-46, 50-51) end the condition:
    # three findings.
    hist = _low_days(make_history(120, seed=21), [range(40, 45), range(47, 50), range(52, 56)])
    low = _only(run(hist, settings=_settings(clear_after_s=2 * 86400.0)), "low_flow")
    assert [days_after_t0(f.start) for f in low] == [40, 47, 52]
    with pytest.raises(ValueError, match="clear_after_s"):
        _settings(clear_after_s=-1.0)


def test_low_flow_stays_open_until_a_week_has_passed() -> None:
    hist = _low_days(make_history(60, seed=22), [range(40, 45)])
    # day 50 is 5 days after the last low window: still open, saying it is above again
    f = _only(run(hist.iloc[:50], settings=_settings()), "low_flow")[0]
    assert f.end is None and f.evidence["in_condition"] == 0.0
    assert "above it since" in f.message and "below its minimum" in f.message
    f = _only(run(hist, settings=_settings()), "low_flow")[0]  # day 60: 15 days after
    assert f.end is not None and days_after_t0(f.end) == 45


def test_daily_runs_update_the_same_rows_as_one_run(tmp_path: Path) -> None:
    # The store keys findings on (branch, kind, start): diagnosing every day and
    # upserting must leave exactly the rows one run over the whole history makes.
    hist = _low_days(make_history(150, seed=23, faults=(Fault("step", 80.5, 0.3),)),
                     [range(40, 45), range(47, 50), range(100, 102), range(106, 108)])
    settings = _settings()
    store = open_store(f"sqlite:///{tmp_path / 'bw.db'}")
    try:
        for d in range(30, 151):
            part = hist.iloc[:d]
            found = diagnose(part, settings=settings, now=part["window_end"].max())
            store.upsert_findings([_finding_row(f) for f in found])
        once = run(hist, settings=settings)
        rows = store.read_findings()
    finally:
        store.close()
    assert len(rows) == len(once)
    got = {(r.branch, r.kind, pd.Timestamp(r.start)): r for r in rows.itertuples()}
    for f in once:
        r = got[(f.branch, f.kind, pd.Timestamp(f.start))]
        assert r.message == f.message
        assert (pd.isna(r.end) and f.end is None) or pd.Timestamp(r.end) == pd.Timestamp(f.end)
    assert sum(1 for f in once if f.kind == "low_flow") == 2


def _screening(hist: pd.DataFrame, bad_days: list[int]) -> pd.DataFrame:
    return pd.DataFrame({
        "branch": "CW-3", "window_start": hist["window_start"],
        "window_end": hist["window_end"], "tag": "FT-203",
        "frozen": np.where(hist.index.isin(bad_days), 96, 0), "out_of_range": 0,
        "spikes": 0, "samples": 96,
    })


def test_a_meter_that_keeps_freezing_is_one_instrument_finding() -> None:
    # Frozen on days 40, 43, 44 and 48: one finding of 3 episodes (40, 43-44, 48), 4 of
    # the 9 days from 40 to 49; a freeze on day 70 is 21 days later: a second finding.
    hist = make_history(100, seed=24)
    found = run(hist, screening=_screening(hist, [40, 43, 44, 48, 70]))
    inst = _only(found, "instrument")
    assert len(inst) == 2, found
    f = inst[0]
    assert f.evidence["episodes"] == 3 and f.evidence["windows"] == 4
    assert f.evidence["share_of_time"] == pytest.approx(4 / 9)
    assert f.end is not None and days_after_t0(f.end) == 49
    assert "3 episodes since 2025-02-10, 44 % of the time" in f.message, f.message
    assert "well again since 2025-02-19" in f.message
    assert inst[1].end is not None  # 29 days well after day 70 at day 100


def test_low_flow_message_in_the_tags_unit_states_the_comparison() -> None:
    # issue 12 item 7: 31.5 L/min against a minimum of 30 L/min in L/min, and never
    # "below" for a flow above the minimum (it may stay in its deadband: 5 % above).
    lpm = 1e-3 / 60.0  # [m^3/s] per L/min
    hist = make_history(60, seed=25)
    hist.loc[hist.index.isin([40, 41]), "mean_flow_m3s"] = 29.0 * lpm
    hist.loc[hist.index == 42, "mean_flow_m3s"] = 31.4 * lpm  # in the deadband
    settings = DiagnosisSettings(branches={"CW-3": BranchSettings(
        min_flow_m3s=30.0 * lpm, flow_unit="L/min")})
    f = _only(run(hist.iloc[:43], settings=settings), "low_flow")[0]
    assert "mean flow 31.4 L/min on 2025-02-12, back above its minimum 30.0 L/min but " \
        "within 5 % of it" in f.message, f.message
    assert flow_pair([31.5 * lpm], 30.0 * lpm, "m3/h") == (["1.9"], "1.8")
    assert flow_pair([29.99 * lpm], 30.0 * lpm, "L/min") == (["29.99"], "30.00")


def test_fouling_past_the_limit_says_when_and_rises_in_priority() -> None:
    # A linear ramp from day 40 to r 1.8 at day 140 passes 1.5 at day 40 + 62.5.
    hist = make_history(200, seed=26, faults=(Fault("ramp", 40.0, 1.8, 100.0),))
    before = _only(run(hist.iloc[:95]), "fouling")[0]
    assert before.priority == "medium" and "passed" not in before.message
    f = _only(run(hist), "fouling")[0]
    assert f.priority == "high" and f.evidence["priority"] == 3.0
    passed = pd.Timestamp(f.evidence["limit_passed_s"], unit="s", tz="UTC")
    assert abs(days_after_t0(passed) - 102.5) <= 4  # the day-to-day scatter is 1.5 %
    assert f"passed its cleaning limit 1.50 on {passed:%Y-%m-%d}" in f.message, f.message
    assert f.to_json_dict()["priority"] == "high"


def test_unlogged_cleaning_ends_the_fouling_finding_at_the_fall() -> None:
    # The fouled branch (past 1.5 from about day 102) is cleaned on day 150 and nobody
    # logs it: r falls back to its clean level. The finding ends at the fall and says how
    # to record it; no finding stays open.
    hist = make_history(260, seed=27, faults=(Fault("ramp", 40.0, 1.8, 100.0),))
    clean = make_history(260, seed=27)["r"].to_numpy()
    r = hist["r"].to_numpy().copy()
    r[150:] = clean[150:]
    hist = hist.assign(r=r).drop(columns=[c for c in hist.columns if c.startswith("sum_")])
    found = run(hist)
    assert [f.kind for f in found] == ["fouling"], found
    f = found[0]
    assert f.end is not None and days_after_t0(f.end) == 150
    day = f"{pd.Timestamp(T0) + timedelta(150):%Y-%m-%d}"
    assert f"branchwatch log SITE CW-3 --cleaned {day}" in f.message, f.message
    assert "passing its cleaning limit 1.50 on" in f.message
    assert f.evidence["r_peak"] > 1.5 and f.evidence["r_after_fall"] < 1.1
    assert f.confidence > 0.9  # it was fouled; the fall does not unsay it


def test_report_and_status_show_one_row_with_its_episodes(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The example site's B1-reactor (minimum 70 m3/h) low on days 40-44, 47-49 and 52-55,
    # the worst day 54.0 m3/h (0.015 m^3/s); the store diagnosed on day 58 (3 days after
    # the last episode: still open). One row, with 3 episodes, 12 of the 18 days since
    # day 40 in the condition (67 %), the last one from day 52 (2025-02-22).
    site_file = tmp_path / "site.toml"
    site_file.write_text(EXAMPLE_SITE.read_text())
    (tmp_path / "inbox").mkdir()
    site = load_site(site_file)
    hist = _low_days(make_history(58, seed=28, branch="B1-reactor"),
                     [range(40, 45), range(47, 50), range(52, 56)], flow=0.018, worst=0.015)
    now = hist["window_end"].max().to_pydatetime()
    store = open_store(site.store_url)
    try:
        store.upsert_fits(fits_of(hist.assign(status="ok")))
        found = diagnose_site(site, store, now=now)
        path = write_report(site, store, day=now - timedelta(hours=12), now=now)
    finally:
        store.close()
    low = _only(found, "low_flow")
    assert len(low) == 1 and low[0].end is None and low[0].evidence["episodes"] == 3
    page = path.read_text()
    assert page.count("low flow</span>B1-reactor") == 1
    assert "3 episodes, 67 % of the time, lowest 54.0 m3/h, last 2025-02-22" in page
    assert main(["status", str(site_file)]) == 0
    out = capsys.readouterr().out
    rows = [line for line in out.splitlines() if "low_flow" in line]
    assert len(rows) == 1 and "(3 episodes, 67 % of the time, lowest 54.0 m3/h" in rows[0], out


def test_rows_of_a_store_written_one_per_day_are_closed(tmp_path: Path) -> None:
    # A store written before one condition became one finding holds a low-flow row for
    # each spell, the later ones open. The diagnosis of the whole history makes one
    # finding of them: it updates the row with the same start and closes the others.
    site_file = tmp_path / "site.toml"
    site_file.write_text(EXAMPLE_SITE.read_text())
    (tmp_path / "inbox").mkdir()
    site = load_site(site_file)
    hist = _low_days(make_history(58, seed=28, branch="B1-reactor"),
                     [range(40, 45), range(47, 50), range(52, 56)], flow=0.018, worst=0.015)
    now = hist["window_end"].max().to_pydatetime()
    old = [{"branch": "B1-reactor", "kind": "low_flow", "start": T0 + timedelta(d),
            "detected": T0 + timedelta(d + 1), "end": None, "confidence": 0.9,
            "evidence": {"mean_flow_m3s": 0.018}, "message": "one day of it"}
           for d in (40, 47, 52)]
    later = {**old[0], "start": T0 + timedelta(70), "detected": T0 + timedelta(71)}
    store = open_store(site.store_url)
    try:
        store.upsert_fits(fits_of(hist.assign(status="ok")))
        store.upsert_findings([*old, later])
        diagnose_site(site, store, now=now)
        rows = store.read_findings(kind="low_flow")
    finally:
        store.close()
    by_day = {days_after_t0(pd.Timestamp(r.start)): r for r in rows.itertuples()}
    assert set(by_day) == {40, 47, 52, 70}
    assert pd.isna(by_day[40].end) and by_day[40].evidence["episodes"] == 3
    for d in (47, 52):
        assert pd.Timestamp(by_day[d].end) == pd.Timestamp(now)
        assert by_day[d].evidence["superseded"] == 1.0 and "closed" in by_day[d].message
    assert pd.isna(by_day[70].end)  # first reported after the diagnosis time: left alone
