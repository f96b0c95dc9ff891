"""Tests of the low-flow alarm and its ISA-18.2 / IEC 62682 life cycle."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import UTC, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest

from monitor.analysis.diagnose import Finding
from monitor.app.alarm_process import LowFlowSettings, evaluate_low_flow
from monitor.app.alarm_rates import alarm_rate_summary
from monitor.app.alarms import (
    AlarmEvent,
    AlarmState,
    State,
    acknowledge,
    remove_from_service,
    reset,
    return_to_service,
    shelve,
    unshelve,
)
from monitor.site.config import Site

T0 = datetime(2026, 3, 2, 6, 0, tzinfo=UTC)
M3H = 1 / 3600  # m³/h in m³/s
# Limit 60 m³/h on a 0–200 m³/h meter: deadband 5 % of range = 10 m³/h (ISA-18.2 table
# for flow, from memory), so the condition clears at 70 m³/h.
TWO_MIN = timedelta(minutes=2)
SETTINGS = LowFlowSettings(
    min_flow_m3s=60 * M3H, range_m3s=200 * M3H, on_delay=TWO_MIN, off_delay=TWO_MIN
)


def flow(values_m3h: Sequence[float], start: datetime = T0, step_s: int = 60) -> pd.Series:
    idx = pd.DatetimeIndex([start + timedelta(seconds=step_s * k)
                            for k in range(len(values_m3h))])  # fmt: skip
    return pd.Series(np.asarray(values_m3h) * M3H, index=idx)


def end_of(series: pd.Series) -> datetime:
    return series.index[-1].to_pydatetime()


def test_on_delay_needs_the_condition_to_hold() -> None:
    state = AlarmState("CW-3")
    # 2 minutes below is not yet 2 minutes *held* at the second sample: 0 s, 60 s, 120 s
    short = flow([100, 50, 50, 100, 50, 50, 100])
    s, ev = evaluate_low_flow(short, state, SETTINGS, end_of(short))
    assert ev == [] and s.state == State.NORMAL
    held = flow([100, 50, 50, 50, 50])
    s, ev = evaluate_low_flow(held, state, SETTINGS, end_of(held))
    assert [e.action for e in ev] == ["activated"]
    assert s.state == State.UNACK and s.active
    assert ev[0].time == T0 + timedelta(minutes=3)  # first low at 1 min + 2 min on-delay
    assert "60.0 m3/h" in ev[0].message


def test_deadband_and_off_delay_stop_chattering() -> None:
    # A flow hovering around the limit (55–65 m³/h) for an hour: one alarm, not dozens.
    rng = np.random.default_rng(0)
    hover = flow(list(50 + 15 * rng.random(60)))
    _, ev = evaluate_low_flow(hover, AlarmState("CW-3"), SETTINGS, end_of(hover))
    assert [e.action for e in ev] == ["activated"]
    summary = alarm_rate_summary(ev, now=end_of(hover))
    assert summary.chattering == ()
    # Without deadband and delays the same signal chatters (EEMUA 191: 3 in 1 min).
    raw = LowFlowSettings(min_flow_m3s=60 * M3H, range_m3s=200 * M3H, deadband_fraction=0.0,
                          on_delay=timedelta(0), off_delay=timedelta(0))  # fmt: skip
    fast = flow(list(50 + 15 * rng.random(60)), step_s=15)
    _, ev_raw = evaluate_low_flow(fast, AlarmState("CW-3"), raw, end_of(fast))
    acts = [e for e in ev_raw if e.action == "activated"]
    assert len(acts) > 5
    assert alarm_rate_summary(ev_raw, now=end_of(fast)).chattering == (("CW-3", "low_flow"),)


def test_life_cycle_normal_unack_ack_normal() -> None:
    s = AlarmState("CW-3")
    low = flow([50] * 5)
    s, _ = evaluate_low_flow(low, s, SETTINGS, end_of(low))
    assert s.state == State.UNACK
    s, ev = acknowledge(s, T0 + timedelta(minutes=6), "operator A")
    assert s.state == State.ACK and ev[0].by == "operator A"
    # between limit and limit + deadband: still active
    mid = flow([65] * 5, start=T0 + timedelta(minutes=10))
    s, ev = evaluate_low_flow(mid, s, SETTINGS, end_of(mid))
    assert ev == [] and s.state == State.ACK
    ok = flow([80] * 5, start=T0 + timedelta(minutes=20))
    s, ev = evaluate_low_flow(ok, s, SETTINGS, end_of(ok))
    assert [e.action for e in ev] == ["returned"] and s.state == State.NORMAL


def test_return_unacknowledged_then_ack() -> None:
    s = AlarmState("CW-3")
    series = flow([50] * 5 + [80] * 5)
    s, ev = evaluate_low_flow(series, s, SETTINGS, end_of(series))
    assert [e.action for e in ev] == ["activated", "returned"]
    assert s.state == State.RTN_UNACK
    s, ev = acknowledge(s, end_of(series), "B")
    assert s.state == State.NORMAL and ev[0].action == "acknowledged"


def test_reingest_changes_nothing() -> None:
    series = flow([50] * 5)
    s1, ev1 = evaluate_low_flow(series, AlarmState("CW-3"), SETTINGS, end_of(series))
    s2, ev2 = evaluate_low_flow(series, s1, SETTINGS, end_of(series))
    assert ev1 and ev2 == [] and s2 == s1


def test_latching_needs_ack_and_reset() -> None:
    latch = LowFlowSettings(min_flow_m3s=60 * M3H, range_m3s=200 * M3H, latching=True,
                            on_delay=TWO_MIN, off_delay=TWO_MIN)  # fmt: skip
    series = flow([50] * 5 + [80] * 5)
    s, ev = evaluate_low_flow(series, AlarmState("CW-3"), latch, end_of(series))
    assert [e.action for e in ev] == ["activated"] and s.state == State.UNACK and not s.active
    s, _ = reset(s, end_of(series), "A")
    assert s.state == State.UNACK  # not acknowledged yet: reset refused
    s, _ = acknowledge(s, end_of(series), "A")
    s, ev = reset(s, end_of(series), "A")
    assert s.state == State.NORMAL and ev[0].action == "reset"


def test_shelve_expires_and_reannunciates() -> None:
    s = AlarmState("CW-3")
    s, ev = shelve(s, T0 + timedelta(minutes=30), now=T0)
    assert s.state == State.SHELVED and ev[0].action == "shelved"
    low = flow([50] * 20)
    s, ev = evaluate_low_flow(low, s, SETTINGS, end_of(low))
    assert ev == [] and s.active and s.state == State.SHELVED  # tracked, not annunciated
    later = flow([50] * 5, start=T0 + timedelta(minutes=28))
    s, ev = evaluate_low_flow(later, s, SETTINGS, end_of(later))
    assert [e.action for e in ev] == ["unshelved"] and s.state == State.UNACK
    with pytest.raises(ValueError, match="until"):
        shelve(s, T0, now=T0 + timedelta(hours=1))
    s2, _ = shelve(AlarmState("CW-3"), T0 + timedelta(hours=1), now=T0)
    s2, ev = unshelve(s2, now=T0 + timedelta(minutes=5))
    assert s2.state == State.NORMAL and ev[0].action == "unshelved"


def test_out_of_service_and_back() -> None:
    s, ev = remove_from_service(AlarmState("CW-3"), now=T0, by="maint")
    assert s.state == State.OUT_OF_SERVICE
    low = flow([50] * 10)
    s, ev = evaluate_low_flow(low, s, SETTINGS, end_of(low))
    assert ev == [] and s.state == State.OUT_OF_SERVICE
    s, ev = return_to_service(s, now=end_of(low))
    assert s.state == State.NORMAL and ev[0].action == "returned_to_service"
    more = flow([50] * 5, start=end_of(low) + timedelta(minutes=1))
    s, ev = evaluate_low_flow(more, s, SETTINGS, end_of(more))
    assert [e.action for e in ev] == ["activated"]


def test_message_names_the_likely_cause() -> None:
    finding = Finding(branch="CW-3", kind="restriction", start=T0 - timedelta(days=2),
                      detected=T0 - timedelta(days=1), end=None, confidence=0.93,
                      evidence={}, message="")  # fmt: skip
    low = flow([50] * 5)
    _, ev = evaluate_low_flow(low, AlarmState("CW-3"), SETTINGS, end_of(low),
                              diagnosis=[finding])  # fmt: skip
    assert "likely cause: restriction" in ev[0].message
    _, ev = evaluate_low_flow(low, AlarmState("CW-3"), SETTINGS, end_of(low), diagnosis=[])
    assert "likely cause" not in ev[0].message


def test_gap_restarts_the_on_delay() -> None:
    series = pd.concat([flow([50]), flow([50], start=T0 + timedelta(hours=1))])
    _, ev = evaluate_low_flow(series, AlarmState("CW-3"), SETTINGS, end_of(series))
    assert ev == []


def test_rate_summary_eemua_figures() -> None:
    def act(t: datetime, branch: str) -> AlarmEvent:
        return AlarmEvent(t, branch, "low_flow", "activated", State.UNACK)

    # 12 different branches within 5 min: a flood (EEMUA 191: > 10 in 10 min)
    flood = [act(T0 + timedelta(seconds=25 * k), f"CW-{k}") for k in range(12)]
    # one branch in alarm since two days ago, never returned: stale (> 24 h)
    old = act(T0 - timedelta(days=2), "CW-99")
    summary = alarm_rate_summary([*flood, old], now=T0 + timedelta(hours=1))
    assert summary.activations == 13
    assert summary.max_in_10_min == 12
    assert len(summary.floods) == 1 and summary.floods[0][1] == 12
    assert summary.stale == (("CW-99", "low_flow", T0 - timedelta(days=2)),)
    assert summary.chattering == ()
    calm = alarm_rate_summary(flood[:5], now=T0 + timedelta(days=1))
    assert calm.floods == () and calm.per_10_min < 0.1


def test_settings_reject_bad_values() -> None:
    with pytest.raises(ValueError, match="range_m3s"):
        LowFlowSettings(min_flow_m3s=0.01, range_m3s=0.0)
    with pytest.raises(ValueError, match="on_delay"):
        LowFlowSettings(min_flow_m3s=0.01, range_m3s=0.1, on_delay=timedelta(seconds=-1))


# ---------------------------------------------------------------------------------------
# the alarms verb: site time, the journal names its alarm, no shelving into the past
# (ISA-18.2 shelving is for a set time ahead; a shelf that ended before it began is an
# operator's typo, not an action). Data: the demo site (invented), see `small_site`.


def test_describe_condition_names_which_alarm() -> None:
    from monitor.app.alarms import describe_condition

    assert describe_condition("B2", "low_flow") == "low flow on B2"
    assert describe_condition("header", "frozen PT-100") == "frozen PT-100"
    assert describe_condition("CW-3", "stale FT-203") == "stale FT-203"
    assert describe_condition("source", "stale source").startswith("stale source")


@pytest.fixture(scope="module")
def alarm_site(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from tests.monitor.small_site import ingested_site

    return ingested_site(tmp_path_factory.mktemp("alarms-cli"))


@pytest.fixture
def judged_site(alarm_site: Path, tmp_path: Path) -> tuple[Path, Site]:
    """A copy of the site whose alarms were judged now: its April data is stale."""
    from adapters.base import open_store
    from monitor.app.alarm_watch import evaluate_alarms
    from monitor.app.ingest import open_source
    from tests.monitor.small_site import copy_site

    site_file, site = copy_site(alarm_site, tmp_path / "site")
    store = open_store(site.store_url)
    try:
        evaluate_alarms(site, store, open_source(site), now=datetime.now(UTC))
    finally:
        store.close()
    return site_file, site


def _state(site: Site, branch: str, condition: str) -> str:
    from adapters.base import open_store

    store = open_store(site.store_url)
    try:
        frame = store.read_alarms()
    finally:
        store.close()
    row = frame[(frame["branch"] == branch) & (frame["condition"] == condition)]
    return str(row.iloc[0]["state"])


def test_alarms_verb_shows_site_time_and_the_journal_names_the_alarm(
    judged_site: tuple[Path, Site], capsys: pytest.CaptureFixture[str],
) -> None:
    from adapters.base import open_store
    from monitor.app.cli import main

    site_file, site = judged_site
    store = open_store(site.store_url)
    try:
        entry = store.alarm_events().iloc[-1]
        activated = store.read_alarms()
    finally:
        store.close()
    assert main(["alarms", str(site_file)]) == 0
    out = capsys.readouterr().out
    assert f"times in site time ({site.timezone})" in out
    zone = ZoneInfo(site.timezone)
    local = pd.Timestamp(entry["time"]).tz_convert(zone).strftime("%Y-%m-%d %H:%M")
    journal = out.split("latest journal entries:")[1]
    assert f"{local}  stale source (no tag has fresh data)" in journal
    assert "Z " not in journal  # no UTC stamps left
    row = activated[activated["condition"] == "stale source"].iloc[0]
    since = pd.Timestamp(row["activated"]).tz_convert(zone).strftime("%Y-%m-%d %H:%M")
    assert f"since {since}" in out


def test_shelving_into_the_past_is_refused_with_one_line(
    judged_site: tuple[Path, Site], capsys: pytest.CaptureFixture[str],
) -> None:
    from monitor.app.cli import main

    site_file, site = judged_site
    code = main(["alarms", str(site_file), "--shelve", "source", "--until",
                 "2026-01-01 06:00", "--by", "shift B"])
    err = capsys.readouterr().err
    assert code == 2
    assert len(err.strip().splitlines()) == 1 and "not in the future" in err
    assert _state(site, "source", "stale source") == "unack"  # nothing changed
    future = (datetime.now(UTC) + timedelta(days=1)).astimezone(ZoneInfo(site.timezone))
    assert main(["alarms", str(site_file), "--shelve", "source", "--until",
                 f"{future:%Y-%m-%d %H:%M}"]) == 0
    assert _state(site, "source", "stale source") == "shelved"


# ---------------------------------------------------------------------------------------
# issue 12 item 7: messages in the tag's own unit, site time, a return that says so

LPM = 1 / 60_000  # L/min in m³/s


def test_low_flow_message_in_the_tags_unit_keeps_the_comparison() -> None:
    # the rig's meter reads L/min; limit 30 L/min. 29.96 L/min rounded to one decimal
    # would read "30.0 ... below its minimum 30.0": the digits must show the comparison
    lpm = LowFlowSettings(min_flow_m3s=30 * LPM, range_m3s=100 * LPM, on_delay=TWO_MIN,
                          off_delay=TWO_MIN)
    idx = pd.DatetimeIndex([T0 + timedelta(minutes=k) for k in range(4)])
    low = pd.Series(np.array([40.0, 29.96, 29.96, 29.96]) * LPM, index=idx)
    _, ev = evaluate_low_flow(low, AlarmState("R1"), lpm, end_of(low), unit="L/min",
                              timezone="Europe/Berlin")
    assert "29.96 L/min, below its minimum 30.00 L/min" in ev[0].message
    # site time (UTC+1 in March before the change): the condition began at 07:01
    assert "since 2026-03-02 07:01 site time" in ev[0].message and "UTC" not in ev[0].message


def test_format_pair_never_reverses_or_hides_the_comparison() -> None:
    from monitor.app.alarms import format_pair

    rng = np.random.default_rng(3)
    for _ in range(2000):  # random pairs near each other: the shown order is the true one
        limit = float(rng.uniform(0.1, 500))
        value = limit * (1 + float(rng.normal(0, 0.003)))
        a, b = format_pair(value, limit)
        assert (float(a) < float(b)) == (value < limit), (value, limit, a, b)
        assert (float(a) > float(b)) == (value > limit), (value, limit, a, b)
    assert format_pair(31.5, 30.0) == ("31.5", "30.0")  # no needless digits


def test_returned_entry_says_the_condition_cleared() -> None:
    low = flow([100, 50, 50, 50])
    s, ev = evaluate_low_flow(low, AlarmState("CW-3"), SETTINGS, end_of(low))
    activation = ev[0].message
    ok = flow([80, 80, 80, 80], start=end_of(low) + timedelta(minutes=1))
    s, ev = evaluate_low_flow(ok, s, SETTINGS, end_of(ok))
    assert [e.action for e in ev] == ["returned"]
    assert ev[0].message != activation and "cleared" in ev[0].message
    assert "80.0 m3/h, back at or above 70.0 m3/h" in ev[0].message  # 60 + 5 % of 200


def test_stale_return_says_fresh_again() -> None:
    from monitor.app.alarm_instruments import StaleSettings, evaluate_stale

    st = StaleSettings(stale_after=timedelta(minutes=15))
    s, ev = evaluate_stale(T0, AlarmState("header", "stale PT-100"), st,
                           T0 + timedelta(minutes=20), subject="PT-100 (header)")
    assert [e.action for e in ev] == ["activated"] and "No new data" in ev[0].message
    s, ev = evaluate_stale(T0 + timedelta(minutes=24), s, st, T0 + timedelta(minutes=25),
                           subject="PT-100 (header)", timezone="Europe/Berlin")
    assert [e.action for e in ev] == ["returned"]
    assert "fresh again at 2026-03-02 07:25 site time" in ev[0].message
    assert "No new data" not in ev[0].message


def test_frozen_message_in_the_tags_unit_and_site_time() -> None:
    from monitor.app.alarm_instruments import FrozenSettings, evaluate_frozen

    idx = pd.DatetimeIndex([T0 + timedelta(minutes=k) for k in range(70)])
    held = pd.Series(np.full(70, 31.5 * LPM), index=idx)
    _, ev = evaluate_frozen(held, AlarmState("R1", "frozen FT-1"), FrozenSettings(),
                            end_of(held), tag="FT-1", unit_label="L/min", kind="flow",
                            timezone="Europe/Berlin")
    assert "read exactly 31.5 L/min since 2026-03-02 07:00 site time" in ev[0].message


def test_backflow_alarm_needs_two_samples_and_clears_past_the_deadband() -> None:
    # the back-flow alarm's own rules (monitor.app.alarm_process.evaluate_backflow): header below
    # the static back-pressure on two samples in a row raises it; it returns only once
    # the header is 0.05 bar (deadband, our choice) above for the off-delay
    from monitor.app.alarm_process import BackflowAlarmSettings, evaluate_backflow

    cfg = BackflowAlarmSettings(off_delay=TWO_MIN, timezone="Europe/Berlin")
    idx = pd.DatetimeIndex([T0 + timedelta(minutes=k) for k in range(12)])
    header = np.array([1.2, 0.9, 1.2, 0.9, 0.9, 1.02, 1.02, 1.02, 1.02, 1.1, 1.1, 1.1]) * 1e5
    samples = pd.DataFrame({"header_pa": header, "static_pa": 1.0e5}, index=idx)
    s, ev = evaluate_backflow(samples, AlarmState("T1", "backflow"), cfg, end_of(samples))
    # a lone sample below (minute 1) is no condition; minutes 3–4 are; 1.02 bar is above
    # the static head but inside the deadband: still in; 1.1 bar for 2 min clears it
    assert [(e.action, e.time) for e in ev] == [
        ("activated", T0 + timedelta(minutes=4)), ("returned", T0 + timedelta(minutes=11))]
    assert "header 0.90 bar, below the branch's static back-pressure 1.00 bar" in ev[0].message
    assert "since 2026-03-02 07:03 site time" in ev[0].message
    assert "cleared" in ev[1].message and s.state == State.RTN_UNACK
    from monitor.app.alarms import priority_of

    assert priority_of("backflow") == "high"
