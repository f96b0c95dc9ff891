"""Tests of the operations the command line prints: the alarm actions, and the reset of
a latched alarm (ISA-18.2: a latched alarm stays in after its condition returned to
normal until an operator acknowledges and resets it).

Data: the demo site (invented), see `small_site`; the low-flow series below are our own.
"""

from __future__ import annotations

import dataclasses
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from adapters.base import open_store
from monitor.app.alarm_points import alarm_row, low_flow_settings
from monitor.app.alarm_process import evaluate_low_flow
from monitor.app.alarms import AlarmState, State
from monitor.app.operations import AlarmAction, alarm_action, alarm_listing, status_summary
from monitor.site.config import Site

BRANCH = "B3-quench"  # limit 20 m3/h in the demo site file


@pytest.fixture(scope="module")
def ops_site(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from tests.monitor.small_site import ingested_site

    return ingested_site(tmp_path_factory.mktemp("operations"))


@pytest.fixture
def site(ops_site: Path, tmp_path: Path) -> tuple[Path, Site]:
    from tests.monitor.small_site import copy_site

    return copy_site(ops_site, tmp_path / "site")


def _latching(site: Site) -> Site:
    analysis = site.analysis.model_copy(update={"low_flow_latching": True})
    return dataclasses.replace(site, analysis=analysis)


def _judge(site: Site, state: AlarmState, m3h: list[float], start: datetime) -> AlarmState:
    """Judge a low-flow series of 1-min samples and store the state as the jobs do."""
    settings = low_flow_settings(site, site.branch(BRANCH))
    idx = pd.DatetimeIndex([start + timedelta(minutes=k) for k in range(len(m3h))])
    series = pd.Series(np.asarray(m3h) / 3600.0, index=idx)
    new, _ = evaluate_low_flow(series, state, settings, idx[-1].to_pydatetime())
    store = open_store(site.store_url)
    try:
        store.upsert_alarms([alarm_row(new, limit_m3s=settings.min_flow_m3s,
                                       now=idx[-1].to_pydatetime())])
    finally:
        store.close()
    return new


def test_the_latching_setting_reaches_the_low_flow_alarm(site: tuple[Path, Site]) -> None:
    _, s = site
    assert not low_flow_settings(s, s.branch(BRANCH)).latching  # the default
    assert low_flow_settings(_latching(s), s.branch(BRANCH)).latching


def test_a_latched_alarm_is_reset_only_after_return_to_normal_and_acknowledgement(
    site: tuple[Path, Site], capsys: pytest.CaptureFixture[str],
) -> None:
    from monitor.app.cli import main

    site_file, s = site
    s = _latching(s)
    t0 = datetime.now(UTC) - timedelta(hours=3)
    # 5 m3/h for 30 min: well below the 20 m3/h limit, past the 10-min on-delay
    state = _judge(s, AlarmState(BRANCH), [5.0] * 30, t0)
    assert state.state == State.UNACK and state.active

    args = ["alarms", str(site_file), "--reset", BRANCH, "--condition", "low_flow"]
    assert main(args) == 2  # refused: the flow is still low
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "still active" in err[0] and "returned to normal" in err[0]

    # the flow comes back (50 m3/h for 30 min, past the 5-min off-delay): latched
    state = _judge(s, state, [50.0] * 30, t0 + timedelta(minutes=30))
    assert state.state == State.UNACK and not state.active
    assert main(args) == 2  # refused: nobody has acknowledged it
    assert "acknowledge it first" in capsys.readouterr().err

    assert main(["alarms", str(site_file), "--ack", BRANCH, "--condition", "low_flow",
                 "--by", "shift A"]) == 0
    assert f"{BRANCH} low_flow: unack -> ack" in capsys.readouterr().out
    before = datetime.now(UTC)
    assert main([*args, "--by", "shift A"]) == 0
    assert f"{BRANCH} low_flow: ack -> normal" in capsys.readouterr().out

    store = open_store(s.store_url)
    try:
        journal = store.alarm_events(branch=BRANCH)
        row = store.read_alarms(BRANCH)
    finally:
        store.close()
    last = journal.iloc[-1]
    assert (last["condition"], last["from_state"], last["to_state"]) == ("low_flow", "ack",
                                                                         "normal")
    assert pd.Timestamp(last["time"]) >= pd.Timestamp(before) - pd.Timedelta(seconds=1)
    assert row[row["condition"] == "low_flow"].iloc[0]["state"] == "normal"
    assert main(args) == 0  # nothing left to reset
    assert f"{BRANCH}: nothing to do" in capsys.readouterr().out


def test_an_alarm_that_never_latched_returns_by_itself(site: tuple[Path, Site]) -> None:
    _, s = site
    t0 = datetime.now(UTC) - timedelta(hours=3)
    state = _judge(s, AlarmState(BRANCH), [5.0] * 30, t0)
    state = _judge(s, state, [50.0] * 30, t0 + timedelta(minutes=30))
    assert state.state == State.RTN_UNACK  # not latching: no reset needed


def test_alarm_action_returns_records_and_the_listing_shows_the_change(
    site: tuple[Path, Site],
) -> None:
    _, s = site
    t0 = datetime.now(UTC) - timedelta(hours=3)
    _judge(s, AlarmState(BRANCH), [5.0] * 30, t0)
    store = open_store(s.store_url)
    try:
        done = alarm_action(s, store, AlarmAction.ACKNOWLEDGE, BRANCH, now=datetime.now(UTC),
                            condition="low_flow", by="shift B")
        listing = alarm_listing(store)
        status = status_summary(s, store, now=datetime.now(UTC))
    finally:
        store.close()
    assert [(c.condition, c.from_state, c.to_state) for c in done.changes] == [
        ("low_flow", State.UNACK, State.ACK)]
    assert done.refusals == ()
    line = next(a for a in listing.alarms if a.branch == BRANCH)
    assert line.state == "ack" and line.since is not None
    assert listing.journal[-1].alarm == f"low flow on {BRANCH}"
    assert (listing.journal[-1].from_state, listing.journal[-1].to_state) == ("unack", "ack")
    assert status.site == s.name and {t.tag for t in status.tags} >= set(s.tags)


def test_an_unknown_alarm_is_refused_with_what_to_do(site: tuple[Path, Site]) -> None:
    from monitor.app.operations import OperationError

    _, s = site
    store = open_store(s.store_url)
    try:
        with pytest.raises(OperationError, match="never evaluated"):
            alarm_action(s, store, AlarmAction.RESET, BRANCH, now=datetime.now(UTC))
        with pytest.raises(KeyError):
            alarm_action(s, store, AlarmAction.RESET, "B9-nowhere", now=datetime.now(UTC))
    finally:
        store.close()


def test_the_alarms_verb_prints_its_records_as_json(
    site: tuple[Path, Site], capsys: pytest.CaptureFixture[str],
) -> None:
    import json

    from monitor.app.cli import main

    site_file, s = site
    _judge(s, AlarmState(BRANCH), [5.0] * 30, datetime.now(UTC) - timedelta(hours=3))
    assert main(["alarms", str(site_file), "--ack", BRANCH, "--condition", "low_flow",
                 "--json"]) == 0
    done = json.loads(capsys.readouterr().out)
    assert done["action"] == "acknowledge" and done["refused"] == []
    assert done["changes"] == [{"branch": BRANCH, "condition": "low_flow",
                                "from_state": "unack", "to_state": "ack"}]
    assert main(["alarms", str(site_file), "--reset", BRANCH, "--condition", "low_flow",
                 "--json"]) == 2  # still active: refused, said in the record
    refused = json.loads(capsys.readouterr().out)["refused"]
    assert len(refused) == 1 and "still active" in refused[0]["reason"]
    assert main(["alarms", str(site_file), "--json"]) == 0
    listing = json.loads(capsys.readouterr().out)
    mine = [a for a in listing["alarms"] if a["branch"] == BRANCH]
    assert [a["state"] for a in mine] == ["ack"] and mine[0]["since"].endswith("+00:00")
    assert listing["journal"][-1]["to_state"] == "ack"
