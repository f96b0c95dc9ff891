"""The back-flow hazard from logged data (issue 8 part 4) and the alarm replay of a past
period (issue 12 item 8).

The site is built here: one header and a branch to a tank whose bottom is 8 m up with a
fixed 2 m level, so its static back-pressure is ρ·g·10 m ≈ 0.98 bar at 20 °C. Its header
is held at 2.0 bar by day and set back to 0.80 bar at night (22:00–05:00 site time), below
that static head: the branch cannot flow then, and without a check valve water can run
back from the tank into the supply (DESIGN §2). The flows come from the branch's own
model (`model.branch.Branch.flow`); invented data.

The flow meter is healthy: by day it follows the flow with 0.5 % noise, at night it reads
a steady 0.8 m3/h (a zero offset at 0.1 m3/h display resolution, 0.7 % of its 120 m3/h
span: within the zero stability of about 1 % of span a magnetic meter is commonly sold
with, from memory), more than the screening's default flow noise (0.36 m3/h) so that
only the knowledge that the branch cannot flow keeps it from being called frozen.
"""

from __future__ import annotations

import html
import math
import os
import time
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from adapters.base import ReadingsSource, ResultsStore, open_store
from model.water import G, density
from monitor.analysis.backflow import cannot_flow, hazard_branches
from monitor.app.alarm_instruments import FrozenSettings, evaluate_frozen
from monitor.app.alarm_watch import ingest_and_watch, replay_alarms
from monitor.app.alarms import AlarmState
from monitor.app.cli import main
from monitor.app.ingest import ingest, open_source
from monitor.app.jobs import analyze
from monitor.app.morning_report import write_report
from monitor.app.report import CAUTION
from monitor.site.config import Site, load_site

TZ = "Europe/Berlin"
#: the first site-local midnight of the data (winter: UTC+1)
START = pd.Timestamp("2026-01-12 00:00", tz=TZ).tz_convert("UTC").to_pydatetime()
DAYS = 4
STEP = timedelta(minutes=1)
DAY_BAR, NIGHT_BAR = 2.0, 0.80
STATIC_BAR = density(20.0) * G * 10.0 / 1e5  # tank: 8 m base + 2 m level, 20 °C water


def site_text(check_valve: bool) -> str:
    return f"""
[site]
name = "Back-flow test site"
timezone = "{TZ}"
[store]
url = "sqlite:///store.db"
[source]
kind = "csv"
path = "inbox/"
[header]
pressure = {{ tag = "PT-100", unit = "bar" }}
total_flow = {{ tag = "FT-100", unit = "m3/h" }}
running_pressure = "0.5 bar"
[pump]
curve = [
  {{ flow = "0 m3/h", head = "30 m" }},
  {{ flow = "60 m3/h", head = "28 m" }},
  {{ flow = "120 m3/h", head = "22 m" }},
]
speed = {{ tag = "ST-100", unit = "percent" }}
[analysis]
low_flow_on_delay = "10 min"
[schedule]
ingest_every = "15 min"
[[branch]]
name = "T1-tank"
flow = {{ tag = "FT-201", unit = "m3/h", high = 120 }}
check_valve = {"true" if check_valve else "false"}
termination = {{ kind = "tank", base_elevation = "8 m", level = "2 m" }}
elements = [
  {{ pipe = {{ length = "60 m", nps = 4, schedule = "40", material = "carbon steel" }} }},
  {{ fittings = {{ elbow_90 = 4, gate_valve = 2 }} }},
  {{ equipment = {{ rated_dp = "0.5 bar", rated_flow = "60 m3/h" }} }},
]
"""


def night(times: pd.DatetimeIndex) -> np.ndarray:
    hour = times.tz_convert(TZ).hour
    return np.asarray((hour >= 22) | (hour < 5))


def readings(site: Site, start: datetime, end: datetime, seed: int = 7) -> pd.DataFrame:
    """Wide readings in plant units, one row a minute."""
    rng = np.random.default_rng(seed)
    times = pd.date_range(start, end, freq=STEP, inclusive="left")
    dark = night(times)
    p_bar = np.where(dark, NIGHT_BAR, DAY_BAR) + rng.normal(0, 0.004, len(times))
    branch = site.branch("T1-tank").model
    q = np.asarray(branch.flow(p_bar * 1e5)) * 3600.0  # m3/h
    meter = np.where(q > 0, q * (1 + rng.normal(0, 0.005, len(times))), 0.8)
    return pd.DataFrame({
        "timestamp": times.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "PT-100": np.round(p_bar, 4),
        "FT-100": np.round(q * (1 + rng.normal(0, 0.005, len(times))), 2),
        "FT-201": np.round(meter, 1),
        "ST-100": np.round(np.where(dark, 55.0, 90.0) + rng.normal(0, 0.3, len(times)), 1),
    })


@dataclass
class Rig:
    folder: Path
    site: Site
    store: ResultsStore
    source: ReadingsSource

    def drop(self, start: datetime, end: datetime, name: str) -> None:
        path = self.folder / "inbox" / f"{name}.csv"
        readings(self.site, start, end).to_csv(path, index=False)
        # written a minute ago: past the source's settle time (a file still being written)
        past = time.time() - 60
        os.utime(path, (past, past))


def make_rig(folder: Path, check_valve: bool) -> Iterator[Rig]:
    (folder / "inbox").mkdir(parents=True)
    (folder / "site.toml").write_text(site_text(check_valve), encoding="utf-8")
    site = load_site(folder / "site.toml")
    store = open_store(site.store_url)
    source = open_source(site)
    try:
        yield Rig(folder, site, store, source)
    finally:
        source.close()
        store.close()


@pytest.fixture()
def open_rig(tmp_path: Path) -> Iterator[Rig]:
    yield from make_rig(tmp_path / "open", check_valve=False)


@pytest.fixture()
def guarded_rig(tmp_path: Path) -> Iterator[Rig]:
    yield from make_rig(tmp_path / "guarded", check_valve=True)


def watch_first_night(rig: Rig) -> list:
    """Day 1 from 06:00 (after the first night's set-back) up to 21:00 site time in one
    file, then one 15-minute file per ingest until
    01:00, each ingested at its end (`[schedule] ingest_every`): the daemon's rhythm."""
    events = []
    first = START + timedelta(hours=21)
    rig.drop(START + timedelta(hours=6), first, "day1")
    t = first
    events += ingest_and_watch(rig.site, rig.store, rig.source, clock=lambda: first).events
    while t < START + timedelta(hours=25):
        rig.drop(t, t + timedelta(minutes=15), f"part-{t:%H%M}")
        t += timedelta(minutes=15)
        events += ingest_and_watch(rig.site, rig.store, rig.source,
                                   clock=lambda t=t: t).events
    return events


def test_static_head_of_the_test_tank() -> None:
    # 10 m of water at 20 °C (998.2 kg/m3, IAPWS-95) ≈ 0.979 bar: hand arithmetic
    assert pytest.approx(0.979, abs=0.001) == STATIC_BAR
    assert NIGHT_BAR < STATIC_BAR < DAY_BAR


def test_backflow_alarm_within_one_ingest_interval(open_rig: Rig) -> None:
    rig = open_rig
    assert [b.name for b in hazard_branches(rig.site)] == ["T1-tank"]
    events = watch_first_night(rig)
    on = [e for e in events if e.condition == "backflow" and e.action == "activated"]
    onset = START + timedelta(hours=22)  # the set-back, site time
    assert len(on) == 1, events  # one alarm per condition (ISA-18.2), not one per sample
    # raised at the first ingest that holds the condition: within one ingest interval
    assert onset <= on[0].time <= onset + timedelta(seconds=rig.site.schedule.ingest_every)
    row = rig.store.read_alarms().set_index("condition").loc["backflow"]
    assert row["priority"] == "high" and row["state"] == "unack"
    # the message: the branch, both pressures in the tag's unit (bar), the local time
    assert "T1-tank" in on[0].message and "0.80 bar" in on[0].message
    assert f"{STATIC_BAR:.2f} bar" in on[0].message and "22:0" in on[0].message
    assert "site time" in on[0].message and "UTC" not in on[0].message
    # the morning set-back ends at 05:00: a returned entry that says it cleared
    rig.drop(START + timedelta(hours=25), START + timedelta(hours=30), "morning")
    clock = START + timedelta(hours=30)
    back = ingest_and_watch(rig.site, rig.store, rig.source, clock=lambda: clock).events
    ret = [e for e in back if e.condition == "backflow" and e.action == "returned"]
    assert len(ret) == 1 and "cleared" in ret[0].message
    assert ret[0].time >= START + timedelta(hours=29)  # 05:00 + off-delay
    journal = rig.store.alarm_events()
    journal = journal[journal["condition"] == "backflow"]
    # in and out once (an alarm first seen in normal makes no journal entry)
    assert list(journal["to_state"]) == ["unack", "rtn_unack"]
    assert "cleared" in journal["message"].iloc[-1]


def test_backflow_finding_one_per_condition(open_rig: Rig) -> None:
    rig = open_rig
    rig.drop(START, START + timedelta(days=DAYS), "all")
    ingest(rig.site, rig.store, rig.source)
    result = analyze(rig.site, rig.store, rig.source, START, START + timedelta(days=DAYS))
    found = [f for f in result.findings if f.kind == "backflow_hazard"]
    assert len(found) == 1, found  # four nights, one condition
    f = found[0]
    assert f.branch == "T1-tank" and f.end is None
    ev = f.evidence
    assert ev["share_of_time"] == pytest.approx(7 / 24, abs=0.02)  # 22:00–05:00
    assert ev["episodes"] == DAYS + 1  # the data start and end at midnight, in set-back
    # worst margin: header 0.80 bar (noise 0.004 bar, so ≥ 3.5σ below) against 0.979
    assert ev["worst_margin_bar"] == pytest.approx(NIGHT_BAR - STATIC_BAR, abs=0.02)
    assert ev["worst_margin_bar"] < 0
    hour = ev["typical_local_hour"]
    assert hour >= 22 or hour <= 5  # around 01:30 site time
    assert ev["pump_speed_at_worst"] == pytest.approx(0.55, abs=0.015)  # the night speed
    assert ev["load_at_worst_m3h"] < 1.0  # no flow at night
    assert f.start == START  # in set-back from the first sample
    assert "T1-tank" in f.message and "check valve" in f.message and "bar" in f.message
    # the report's safety caution names the hazard, branch and margin, before the
    # standing caution (issue 8 part 4; DESIGN §6)
    text = write_report(rig.site, rig.store, day=START + timedelta(days=DAYS - 1),
                        now=START + timedelta(days=DAYS)).read_text(encoding="utf-8")
    named = text.index("Back-flow hazard:</strong> T1-tank (header below its static "
                       f"back-pressure by up to {abs(ev['worst_margin_bar']):.2f} bar")
    assert named < text.index(html.escape(CAUTION))


def test_check_valve_means_no_backflow_alarm_or_finding(guarded_rig: Rig) -> None:
    rig = guarded_rig
    assert hazard_branches(rig.site) == []
    events = watch_first_night(rig)
    assert not [e for e in events if e.condition == "backflow"]
    rig.drop(START, START + timedelta(hours=6), "early")
    rig.drop(START + timedelta(hours=25), START + timedelta(days=DAYS), "rest")
    ingest(rig.site, rig.store, rig.source)
    result = analyze(rig.site, rig.store, rig.source, START, START + timedelta(days=DAYS))
    assert not [f for f in result.findings if f.kind == "backflow_hazard"]
    assert "backflow" not in set(rig.store.read_alarms()["condition"])
    text = write_report(rig.site, rig.store, day=START + timedelta(days=DAYS - 1),
                        now=START + timedelta(days=DAYS)).read_text(encoding="utf-8")
    # the standing caution only
    assert html.escape(CAUTION) in text and "Back-flow hazard" not in text


def test_healthy_meter_on_a_branch_that_stops_at_night(guarded_rig: Rig) -> None:
    # issue 8 part 4: a meter that reads about zero while the branch cannot flow is not
    # frozen and not spiking: no instrument finding, no frozen-meter alarm
    rig = guarded_rig
    events = watch_first_night(rig)
    rig.drop(START, START + timedelta(hours=6), "early")
    rig.drop(START + timedelta(hours=25), START + timedelta(days=DAYS), "rest")
    clock = START + timedelta(days=DAYS)
    events += ingest_and_watch(rig.site, rig.store, rig.source, clock=lambda: clock).events
    assert not [e for e in events if e.condition.startswith("frozen")], events
    result = analyze(rig.site, rig.store, rig.source, START, START + timedelta(days=DAYS))
    assert not [f for f in result.findings if f.kind == "instrument"], result.findings
    screening = rig.store.read_screening()
    ft = screening[screening["tag"] == "FT-201"]
    assert int(ft["frozen"].sum()) == 0 and int(ft["spikes"].sum()) == 0
    # the control: the same night readings, judged without knowing the branch cannot
    # flow, hold 0.8 m3/h for 7 h — longer than the 1 h hold — and would be called frozen
    frame = rig.store.read_readings(["FT-201", "PT-100"], START, START + timedelta(days=1))
    ft_series = frame[frame["tag"] == "FT-201"].set_index("time")["value"]
    hold = FrozenSettings(hold=timedelta(seconds=rig.site.analysis.frozen_hold))
    _, blind = evaluate_frozen(ft_series, AlarmState("T1-tank", "frozen FT-201"), hold,
                               START + timedelta(days=1), tag="FT-201")
    # both set-backs of the day (00:00–05:00 and 22:00–24:00) would be called frozen
    assert [e.action for e in blind] == ["activated", "returned", "activated"]
    stops = cannot_flow(rig.site, frame)["FT-201"]
    assert stops.mean() == pytest.approx(7 / 24, abs=0.01)


def test_replay_alarms_of_a_past_period(open_rig: Rig) -> None:
    # issue 12 item 8: files of a past period ingested today; the live checks look back
    # only 24 h before the wall clock, so only a replay judges them
    rig = open_rig
    rig.drop(START, START + timedelta(days=2), "old")
    today = datetime(2026, 6, 1, 8, 0, tzinfo=UTC)
    live = ingest_and_watch(rig.site, rig.store, rig.source, clock=lambda: today).events
    assert not [e for e in live if e.condition == "backflow"]
    replayed = replay_alarms(rig.site, rig.store, rig.source, START, START + timedelta(days=2))
    on = [e for e in replayed if e.condition == "backflow" and e.action == "activated"]
    off = [e for e in replayed if e.condition == "backflow" and e.action == "returned"]
    # the data begin at midnight in set-back: in at 00:01, out after 05:00, in at 22:01,
    # out after 05:00, in at 22:01 and still in at the end
    assert len(on) == 3 and len(off) == 2
    for e, hours in zip(on, (0, 22, 46), strict=True):
        onset = START + timedelta(hours=hours)
        assert onset <= e.time <= onset + timedelta(minutes=2), e
    journal = rig.store.alarm_events()
    journal = journal[(journal["condition"] == "backflow") & journal["from_state"].notna()]
    times = [pd.Timestamp(t).to_pydatetime() for t in journal["time"]]
    assert times == sorted(e.time for e in on + off)  # historic times, in order
    assert max(times) < today - timedelta(days=100)  # nothing reads as new today
    # replayed twice: nothing new
    assert replay_alarms(rig.site, rig.store, rig.source, START,
                         START + timedelta(days=2)) == []


def test_analyze_alarms_option(open_rig: Rig, capsys: pytest.CaptureFixture[str]) -> None:
    rig = open_rig
    rig.drop(START, START + timedelta(days=2), "old")
    ingest(rig.site, rig.store, rig.source)
    code = main(["analyze", str(rig.folder / "site.toml"), "--from", "2026-01-12",
                 "--to", "2026-01-14", "--alarms"])
    assert code == 0
    out = capsys.readouterr().out
    assert "back-flow hazard on T1-tank" in out and "2026-01-12 22:0" in out
    journal = rig.store.alarm_events()
    assert (journal["condition"] == "backflow").sum() == 5  # in, out, in, out, in
    assert not math.isnan(float(rig.store.read_alarms().set_index("condition")
                                .loc["backflow", "value"]))


def test_daily_runs_keep_one_finding(open_rig: Rig) -> None:
    # the daemon analyses one day at a time and reads only the days it needs: ten daily
    # runs leave the same one finding, with its first start, as one backfill would
    rig = open_rig
    days = 10
    rig.drop(START, START + timedelta(days=days), "all")
    ingest(rig.site, rig.store, rig.source)
    for d in range(days):
        analyze(rig.site, rig.store, rig.source, START + timedelta(days=d),
                START + timedelta(days=d + 1))
    stored = rig.store.read_findings()
    stored = stored[stored["kind"] == "backflow_hazard"]
    assert len(stored) == 1, stored
    row = stored.iloc[0]
    assert pd.Timestamp(row["start"]) == pd.Timestamp(START) and pd.isna(row["end"])
    assert row["evidence"]["episodes"] == days + 1
    assert row["evidence"]["share_of_time"] == pytest.approx(7 / 24, abs=0.02)
