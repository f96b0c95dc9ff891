"""The stale-data (communication loss) alarm, and the data's age in ``status`` and in the
morning report's header.

References: the alarm life cycle is ISA-18.2 / IEC 62682 (REFERENCES.md): one alarm per
condition, acknowledged, returned to normal, shelved, out of service. The age limit
(max(1 h, 4 x ingest interval, 3 x sample period)) is this project's choice, documented
in `monitor.app.alarm_points.stale_after`. Data: the demo site (invented), see `small_site`.
"""

from __future__ import annotations

import dataclasses
import json
import shutil
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pandas as pd
import pytest

from adapters.base import open_store
from adapters.records import Batch, empty_quarantine
from monitor.app.alarm_instruments import StaleSettings, evaluate_stale
from monitor.app.alarm_points import stale_after
from monitor.app.alarm_watch import evaluate_alarms, ingest_and_watch, newest_readings
from monitor.app.alarms import (
    AlarmState,
    State,
    acknowledge,
    format_age,
    remove_from_service,
    shelve,
)
from monitor.app.cli import main
from monitor.app.ingest import open_source
from monitor.app.morning_report import write_report
from monitor.site.config import Site
from tests.monitor.small_site import copy_site, ingested_site

T0 = datetime(2026, 12, 2, 6, 0, tzinfo=UTC)
HOUR = timedelta(hours=1)
ONE_HOUR = StaleSettings(stale_after=HOUR)


# ---------------------------------------------------------------------------------------
# the alarm, pure


def test_fresh_data_stays_normal_and_old_data_alarms_at_once() -> None:
    s, ev = evaluate_stale(T0 - timedelta(minutes=50), AlarmState("CW-3", "stale FT-203"),
                           ONE_HOUR, T0, subject="FT-203 (CW-3)")
    assert ev == [] and s.state == State.NORMAL and not s.active
    assert s.last_value == pytest.approx(50 * 60)  # the age [s] is kept
    # no on-delay: the first evaluation past the limit annunciates (the limit is the delay)
    s, ev = evaluate_stale(None, s, ONE_HOUR, T0 + timedelta(minutes=11),
                           subject="FT-203 (CW-3)")
    assert [e.action for e in ev] == ["activated"] and s.state == State.UNACK
    assert ev[0].time == T0 + timedelta(minutes=11)


def test_the_state_remembers_the_newest_reading_when_nothing_can_be_read() -> None:
    # After one good read, a source that cannot be read (newest=None) still ages the data
    # it delivered before: the alarm comes on 1 h after the last reading, not never.
    s, _ = evaluate_stale(T0, AlarmState("CW-3", "stale FT-203"), ONE_HOUR, T0,
                          subject="FT-203")
    s, ev = evaluate_stale(None, s, ONE_HOUR, T0 + timedelta(minutes=59), subject="FT-203")
    assert ev == [] and not s.active
    s, ev = evaluate_stale(None, s, ONE_HOUR, T0 + timedelta(minutes=61), subject="FT-203")
    assert [e.action for e in ev] == ["activated"]
    assert s.last_sample == T0 and s.last_value == pytest.approx(61 * 60)


def test_message_names_the_tag_its_age_and_the_time_in_site_time() -> None:
    newest = datetime(2026, 12, 2, 9, 50, tzinfo=UTC)
    now = newest + timedelta(hours=3, minutes=10)
    _, ev = evaluate_stale(newest, AlarmState("CW-3", "stale FT-203"), ONE_HOUR, now,
                           subject="FT-203 (CW-3)", timezone="America/Chicago")
    # 09:50 UTC is 03:50 in Chicago in December (CST = UTC-6, the IANA tz database)
    assert "FT-203 (CW-3) since 2026-12-02 03:50 site time" in ev[0].message
    assert "3 h 10 min old" in ev[0].message and "1 h allowed" in ev[0].message


def test_life_cycle_ack_then_return_to_normal_once_data_flows() -> None:
    # ISA-18.2: active-acknowledged returns to normal when the condition clears.
    s, _ = evaluate_stale(None, AlarmState("source", "stale source"), ONE_HOUR, T0,
                          subject="source x")
    assert s.state == State.UNACK and "No data from source x yet" in s.message
    s, _ = acknowledge(s, T0 + timedelta(minutes=5), "shift A")
    assert s.state == State.ACK
    s, ev = evaluate_stale(T0 + timedelta(minutes=20), s, ONE_HOUR, T0 + timedelta(minutes=30),
                           subject="source x")
    assert [e.action for e in ev] == ["returned"] and s.state == State.NORMAL


def test_unacknowledged_alarm_that_clears_waits_in_rtn_unack() -> None:
    s, _ = evaluate_stale(None, AlarmState("CW-3", "stale FT-203"), ONE_HOUR, T0, subject="x")
    s, ev = evaluate_stale(T0, s, ONE_HOUR, T0 + timedelta(minutes=1), subject="x")
    assert [e.action for e in ev] == ["returned"] and s.state == State.RTN_UNACK  # ISA-18.2


def test_off_delay_needs_fresh_data_at_two_evaluations() -> None:
    slow = StaleSettings(stale_after=HOUR, off_delay=timedelta(minutes=10))
    s, _ = evaluate_stale(None, AlarmState("CW-3", "stale FT-203"), slow, T0, subject="x")
    t1 = T0 + timedelta(minutes=15)
    s, ev = evaluate_stale(t1, s, slow, t1, subject="x")
    assert ev == [] and s.active  # fresh, but not yet for the off-delay
    t2 = t1 + timedelta(minutes=15)
    s, ev = evaluate_stale(t2, s, slow, t2, subject="x")
    assert [e.action for e in ev] == ["returned"]


def test_shelved_and_out_of_service_alarms_do_not_annunciate() -> None:
    base = AlarmState("CW-3", "stale FT-203")
    shelved, _ = shelve(base, T0 + HOUR, now=T0)
    s, ev = evaluate_stale(None, shelved, ONE_HOUR, T0 + timedelta(minutes=1), subject="x")
    assert ev == [] and s.active and s.state == State.SHELVED  # tracked, not annunciated
    s, ev = evaluate_stale(None, s, ONE_HOUR, T0 + 2 * HOUR, subject="x")
    assert [e.action for e in ev] == ["unshelved"] and s.state == State.UNACK  # expiry
    oos, _ = remove_from_service(base, now=T0)
    s, ev = evaluate_stale(None, oos, ONE_HOUR, T0 + timedelta(days=3), subject="x")
    assert ev == [] and s.state == State.OUT_OF_SERVICE and not s.active


def test_bad_settings_and_naive_times_are_refused() -> None:
    with pytest.raises(ValueError, match="stale_after must be positive"):
        StaleSettings(stale_after=timedelta(0))
    with pytest.raises(ValueError, match="now must be timezone-aware"):
        evaluate_stale(None, AlarmState("b"), ONE_HOUR, datetime(2026, 1, 1), subject="x")


def test_format_age() -> None:
    # plain arithmetic: 95 d = 8 208 000 s
    assert format_age(45) == "45 s"
    assert format_age(12 * 60 + 59) == "12 min"
    assert format_age(3600) == "1 h"
    assert format_age(8_208_000 + 4 * 3600) == "95 d 4 h"
    assert format_age(float("nan")) == "unknown age"


# ---------------------------------------------------------------------------------------
# the checks on a site


@pytest.fixture(scope="module")
def template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return ingested_site(tmp_path_factory.mktemp("fresh"))


@pytest.fixture
def site_copy(template: Path, tmp_path: Path) -> Iterator[tuple[Path, Site, Any]]:
    site_file, site = copy_site(template, tmp_path / "site")
    store = open_store(site.store_url)
    try:
        yield site_file, site, store
    finally:
        store.close()


def _alarms(store: Any) -> dict[tuple[str, str], dict[str, Any]]:
    return {(str(r["branch"]), str(r["condition"])): r
            for r in store.read_alarms().to_dict(orient="records")}


def test_default_age_limit_follows_the_schedule(site_copy: tuple[Path, Site, Any]) -> None:
    _, site, _ = site_copy
    assert stale_after(site) == max(3600.0, 4 * site.schedule.ingest_every,
                                    3 * site.analysis.sample_period)
    slow = dataclasses.replace(site, schedule=site.schedule.model_copy(
        update={"ingest_every": 7200.0}))
    assert stale_after(slow) == 4 * 7200.0
    given = dataclasses.replace(site, analysis=site.analysis.model_copy(
        update={"stale_after": 600.0}))
    assert stale_after(given) == 600.0


def test_one_source_alarm_not_one_per_tag_when_all_data_stops(
    site_copy: tuple[Path, Site, Any],
) -> None:
    _, site, store = site_copy
    newest = max(newest_readings(store).values())
    events = evaluate_alarms(site, store, open_source(site), now=newest + timedelta(minutes=10))
    assert [e for e in events if e.condition.startswith("stale")] == []
    stale_now = [a for a in _alarms(store).values()
                 if str(a["condition"]).startswith("stale") and a["state"] != "normal"]
    assert stale_now == []  # 10 min old data is fresh
    events = evaluate_alarms(site, store, open_source(site), now=newest + 3 * HOUR)
    stale_events = [e for e in events if e.condition.startswith("stale")]
    assert [(e.branch, e.condition, e.action) for e in stale_events] == \
        [("source", "stale source", "activated")]  # EEMUA 191: no flood for one lost link
    assert "3 h" in stale_events[0].message


def test_a_tag_that_stops_alone_gets_its_own_alarm(site_copy: tuple[Path, Site, Any]) -> None:
    _, site, store = site_copy
    branch = next(b for b in site.branches if b.flow_tag is not None)
    tag = branch.flow_tag
    assert tag is not None
    newest = max(newest_readings(store).values())
    later = pd.date_range(newest + timedelta(minutes=10), periods=18, freq="10min")
    others = [t for t in site.tags if t != tag]
    readings = pd.DataFrame({
        "time": pd.DatetimeIndex([t for t in later for _ in others]),
        "tag": [o for _ in later for o in others],
        "value": [1.0] * (len(later) * len(others)), "good": [True] * (len(later) * len(others)),
    })
    store.store_batch(Batch(readings, empty_quarantine(), "test:later", {}), source="test")
    now = later[-1].to_pydatetime() + timedelta(minutes=5)
    events = evaluate_alarms(site, store, open_source(site), now=now)
    stale = [(e.branch, e.condition, e.action) for e in events if e.condition.startswith("stale")]
    assert stale == [(branch.name, f"stale {tag}", "activated")]
    row = _alarms(store)[(branch.name, f"stale {tag}")]
    assert row["state"] == "unack"
    assert float(row["value"]) == pytest.approx((now - newest).total_seconds())
    # judged again with nothing new: one alarm per condition, no second activation
    again = evaluate_alarms(site, store, open_source(site), now=now + timedelta(minutes=15))
    assert [e for e in again if e.condition.startswith("stale")] == []


def test_alarms_are_judged_when_the_ingest_fails(site_copy: tuple[Path, Site, Any]) -> None:
    _, site, store = site_copy
    source = open_source(site)
    shutil.rmtree(site.path.parent / "inbox")  # the export share is gone: the ingest cannot read it
    newest = max(newest_readings(store).values())
    watch = ingest_and_watch(site, store, source, clock=lambda: newest + 2 * HOUR)
    assert watch.summary is None and watch.error is not None
    assert ("source", "stale source") in {(e.branch, e.condition) for e in watch.events}
    assert _alarms(store)[("source", "stale source")]["state"] == "unack"


def test_ingest_verb_evaluates_alarms_and_reports_the_failure(
    site_copy: tuple[Path, Site, Any], capsys: pytest.CaptureFixture[str],
) -> None:
    site_file, site, store = site_copy
    shutil.rmtree(site.path.parent / "inbox")
    # the demo's data is from April 2026, months before now: stale by any limit
    assert main(["ingest", str(site_file)]) == 2
    captured = capsys.readouterr()
    assert "stale source (no tag has fresh data): activated -> unack" in captured.out
    assert captured.err.startswith("branchwatch ingest: error:")
    assert len(captured.err.strip().splitlines()) == 1  # one line, no traceback
    runs = store.job_runs(job="ingest")
    assert runs.iloc[0]["status"] == "failed"


def test_ingest_verb_evaluates_alarms_when_it_works(
    site_copy: tuple[Path, Site, Any], capsys: pytest.CaptureFixture[str],
) -> None:
    site_file, _, store = site_copy
    assert main(["ingest", str(site_file)]) == 0
    assert "stale source" in capsys.readouterr().out
    assert ("source", "stale source") in _alarms(store)


def test_status_shows_each_tags_age_and_flags_stale_ones(
    site_copy: tuple[Path, Site, Any], capsys: pytest.CaptureFixture[str],
) -> None:
    site_file, site, store = site_copy
    newest = newest_readings(store)
    assert main(["status", str(site_file)]) == 0
    out = capsys.readouterr().out
    zone = ZoneInfo(site.timezone)
    for tag, t in newest.items():
        local = t.astimezone(zone).strftime("%Y-%m-%d %H:%M")
        line = next(ln for ln in out.splitlines() if ln.strip().startswith(tag + " "))
        assert local in line and line.rstrip().endswith("STALE")  # April data, read later
        assert " d " in line  # days old
    assert f"{len(site.tags)} of {len(site.tags)} tags stale" in out
    assert main(["status", str(site_file), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert sorted(doc["stale_tags"]) == sorted(site.tags)
    assert doc["stale_after_s"] == stale_after(site)


def test_report_header_gives_the_data_age_and_flags_stale_data(
    site_copy: tuple[Path, Site, Any],
) -> None:
    _, site, store = site_copy
    newest = max(newest_readings(store).values())
    local = newest.astimezone(ZoneInfo(site.timezone)).strftime("%Y-%m-%d %H:%M")
    fresh = write_report(site, store, day=newest - timedelta(hours=12),
                         now=newest + timedelta(minutes=40)).read_text()
    assert f"Data up to {local}, 40 min old" in fresh and "STALE DATA" not in fresh
    old = write_report(site, store, day=newest - timedelta(hours=12),
                       now=newest + timedelta(hours=3, minutes=10)).read_text()
    assert f"Data up to {local}, 3 h 10 min old" in old and "STALE DATA" in old


def test_a_bad_age_limit_is_refused_naming_the_key(tmp_path: Path) -> None:
    from monitor.site.config import ConfigError, load_site

    example = Path(__file__).resolve().parents[2] / "config" / "example-site.toml"
    text = example.read_text().replace('# stale_after = "2 h"', 'stale_after = "0 s"')
    assert 'stale_after = "0 s"' in text
    bad = tmp_path / "site.toml"
    bad.write_text(text)
    with pytest.raises(ConfigError, match="stale_after"):
        load_site(bad)
    good = tmp_path / "good.toml"
    good.write_text(text.replace('stale_after = "0 s"', 'stale_after = "2 h"'))
    assert stale_after(load_site(good)) == 7200.0
