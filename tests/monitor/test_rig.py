"""A test rig's recording through the real path: site file → ingest → analyze → alarms.

The recording is our own (tests/monitor/rig_recording.py): 1-second samples, a header
gauge that resolves 0.05 bar at about 0.07 bar gauge, flows in L/min, a `;`-separated
CSV with spaces in the tag names, no pump curve, and two valve closures of 7 min at the
same time, taking 8 % of one branch's flow and 5 % of the other's. What must hold
(issue 12): every window's verdict names its cause — here the gauge, too coarse for the
drop it must measure — and the relative flow-drop alarm catches each closure within it.
"""

from __future__ import annotations

import tomllib
from datetime import timedelta
from pathlib import Path

import numpy as np
import pytest

from adapters.base import open_store
from monitor.app.alarm_watch import replay_alarms
from monitor.app.ingest import ingest, open_source
from monitor.app.jobs import analyze
from monitor.app.site_diagnosis import diagnosis_settings
from monitor.site.config import load_site, parse_site
from tests.monitor.rig_recording import START, Closure, record, site_toml

CLOSURE = Closure(branch=0, start_s=420, length_s=420, depth=0.08)
#: the shallowest closure the alarm is set for, on the other branch at the same time
SHALLOW = Closure(branch=1, start_s=420, length_s=420, depth=0.05)
SECONDS = 16 * 60


@pytest.fixture(scope="module")
def rig(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    folder = tmp_path_factory.mktemp("rig")
    path = folder / "rig.toml"
    path.write_text(site_toml(branches=2, window="1 min"), encoding="utf-8")
    site = load_site(path)
    rec = record(site, seconds=SECONDS, closures=(CLOSURE, SHALLOW))
    rec.write_csv(folder / "inbox")
    store = open_store(site.store_url)
    source = open_source(site)
    got = ingest(site, store, source)
    end = START + timedelta(seconds=SECONDS)
    summary = analyze(site, store, source, START, end)
    events = replay_alarms(site, store, source, START, end)
    return {"site": site, "store": store, "ingest": got, "analyze": summary,
            "events": events, "folder": folder}


def test_the_logger_file_is_read_whole(rig: dict[str, object]) -> None:
    got = rig["ingest"]
    assert got.stored == 3 * SECONDS  # type: ignore[attr-defined]
    assert got.quarantined == 0  # type: ignore[attr-defined]


def test_every_minute_window_names_the_cause_of_its_verdict(rig: dict[str, object]) -> None:
    fits = rig["store"].read_fits()  # type: ignore[attr-defined]
    assert len(fits) == 2 * 16  # 16 one-minute windows, two branches
    assert rig["analyze"].windows == 16  # type: ignore[attr-defined]
    assert set(fits["status"]) == {"not_identifiable"}
    for message in fits["message"]:
        # the gauge reads 0.05 or 0.10 bar; the loops' dynamic drop is about 0.05 bar
        assert message.startswith("not identifiable: PT 01 header resolves 0.05 bar")
        assert "dynamic drop is" in message


@pytest.mark.parametrize("closure", [CLOSURE, SHALLOW], ids=["8 %", "5 %"])
def test_each_closure_is_caught_within_it_and_nothing_else(rig: dict[str, object],
                                                           closure: Closure) -> None:
    branch = ("loop A", "loop B")[closure.branch]
    events = [e for e in rig["events"]  # type: ignore[attr-defined]
              if e.condition == "flow_drop" and e.branch == branch]
    assert [e.action for e in events] == ["activated", "returned"]
    began = START + timedelta(seconds=closure.start_s)
    ended = began + timedelta(seconds=closure.length_s)
    assert began < events[0].time < ended
    assert f"Flow drop on {branch}" in events[0].message and "L/min" in events[0].message
    assert events[1].time > ended


def test_a_second_replay_changes_nothing(rig: dict[str, object]) -> None:
    site, store = rig["site"], rig["store"]
    source = open_source(site)  # type: ignore[arg-type]
    end = START + timedelta(seconds=SECONDS)
    before = store.read_alarms()  # type: ignore[attr-defined]
    assert replay_alarms(site, store, source, START, end) == []  # type: ignore[arg-type]
    after = store.read_alarms()  # type: ignore[attr-defined]
    assert np.array_equal(before["state"].to_numpy(), after["state"].to_numpy())




def test_the_readme_rig_settings_are_a_valid_site() -> None:
    # the settings the README gives for a rig, with this rig's [site] and branches
    readme = (Path(__file__).parents[2] / "README.md").read_text(encoding="utf-8")
    part = readme.split("## Test rig and commissioning runs", 1)[1]
    block = []
    for line in part.split("\n\n", 2)[2].splitlines():  # the first code block
        if line and not line.startswith("    "):
            break
        block.append(line[4:])
    given = tomllib.loads("\n".join(block))
    assert {"source", "header", "analysis", "diagnosis", "flow_drop"} <= set(given)
    rig_site = tomllib.loads(site_toml(branches=2))
    site = parse_site({**rig_site, **given}, path="README.md")
    assert site.window == timedelta(minutes=1)
    assert site.source is not None and site.source.delimiter == ";"
    assert all(b.flow_drop is not None and b.flow_drop.hold_s == 20.0
               for b in site.branches)
    assert diagnosis_settings(site).baseline_windows == 20
