"""The whole job on a simulated site: exports in a folder → ingest → analyze → findings.

The site is the example site; its data come from the simulator with the demo's faults on
fixed dates (a fouling exchanger, a valve left throttled, a raised header set point, a
frozen meter, a cleaning). Invented data: the check is that each fault is found, named
right and dated near its truth, and that the clean branches stay quiet.
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Iterator
from datetime import timedelta
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from adapters.base import open_store
from monitor.app.alarm_watch import evaluate_alarms
from monitor.app.cli import main
from monitor.app.demo import DEMO_START, prepare_demo
from monitor.app.ingest import ingest, open_source
from monitor.app.jobs import analyze
from monitor.site.config import load_site

DAYS = 130
STEP_S = 600.0

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, Any]]:
    folder = tmp_path_factory.mktemp("pipeline")
    paths = prepare_demo(folder / "site", days=DAYS, step_s=STEP_S)
    site = load_site(paths.site_file)
    store = open_store(site.store_url)
    source = open_source(site)
    first = ingest(site, store, source)
    second = ingest(site, store, source)
    result = analyze(site, store, source, DEMO_START, DEMO_START + timedelta(days=DAYS))
    yield {"site": site, "store": store, "source": source, "first": first,
           "second": second, "result": result, "paths": paths}
    source.close()
    store.close()


@pytest.fixture
def own(demo: dict[str, Any], tmp_path: Path) -> Iterator[dict[str, Any]]:
    """A private copy of the ingested and analysed site (site file, exports, store): a
    test that changes the alarm state sees no other test's, in any order."""
    copied = tmp_path / "site"
    shutil.copytree(demo["paths"].folder, copied)
    site = load_site(copied / demo["paths"].site_file.name)
    store = open_store(site.store_url)
    source = open_source(site)
    yield {"site": site, "store": store, "source": source}
    source.close()
    store.close()


def _found(demo: dict[str, Any], branch: str, kind: str) -> list[Any]:
    return [f for f in demo["result"].findings if f.branch == branch and f.kind == kind]


def test_ingest_keeps_good_rows_quarantines_bad_and_is_idempotent(demo: dict[str, Any]) -> None:
    first, second = demo["first"], demo["second"]
    assert first.stored > 0 and first.quarantined > 0  # the demo spoils a few rows
    assert second.stored == 0 and second.read == 0  # the same files again: nothing new


def test_each_fault_is_found_and_named_right(demo: dict[str, Any]) -> None:
    fouling = _found(demo, "B1-reactor", "fouling")
    restriction = _found(demo, "B2-compressor", "restriction")
    back_pressure = _found(demo, "B4-process", "back_pressure")
    instrument = _found(demo, "B3-quench", "instrument")
    assert fouling and restriction and back_pressure and instrument
    # dated to the hour of the truth (demo_faults): throttled valve on day 70 at 09:30,
    # set point raised on day 95 at 14:00 (10-minute data: the samples within half an
    # hour of a step are not steady) — and found within a day of it (issue 4 goal)
    day, hour = timedelta(days=1), timedelta(hours=1)
    for found, truth in ((restriction[0], DEMO_START + 70 * day + 9.5 * hour),
                         (back_pressure[0], DEMO_START + 95 * day + 14 * hour)):
        assert abs(found.start - truth) <= hour, found
        assert found.detected - truth <= day, found
    # the message dates the step in the site's time zone, as the report does
    local = pd.Timestamp(restriction[0].start).tz_convert(demo["site"].timezone)
    assert f"{local:%Y-%m-%d %H:%M}" in restriction[0].message
    # the frozen meter (days 120-124) is an instrument fault, never fouling of B3
    assert not _found(demo, "B3-quench", "fouling")
    assert instrument[0].start >= DEMO_START + 119 * day


def test_no_false_finding_on_clean_branches(demo: dict[str, Any]) -> None:
    quiet = {"B5-spray", "B6-chiller"}
    noisy = [f for f in demo["result"].findings if f.branch in quiet]
    assert noisy == []
    # a back-pressure step is not a restriction, and a restriction not a back-pressure
    assert not _found(demo, "B4-process", "restriction")
    assert not _found(demo, "B2-compressor", "back_pressure")


def test_fitted_ratio_tracks_the_truth(demo: dict[str, Any]) -> None:
    fits = demo["store"].read_fits(branch="B2-compressor")
    ok = fits[fits["status"].isin(["ok", "not_identifiable"])]
    after = ok[ok["window_start"] >= pd.Timestamp(DEMO_START + timedelta(days=72))]
    before = ok[ok["window_end"] <= pd.Timestamp(DEMO_START + timedelta(days=69))]
    # simulated truth: r = 1.0, then ×1.5 from day 70 (demo_faults)
    assert before["r"].median() == pytest.approx(1.0, abs=0.02)
    assert after["r"].median() == pytest.approx(1.5, abs=0.03)


def test_rerun_of_analysis_changes_nothing(demo: dict[str, Any]) -> None:
    store, site, source = demo["store"], demo["site"], demo["source"]
    before = store.read_findings()
    window = DEMO_START + timedelta(days=DAYS - 3)
    analyze(site, store, source, window, DEMO_START + timedelta(days=DAYS))
    after = store.read_findings()
    assert len(after) == len(before)
    assert sorted(after["kind"]) == sorted(before["kind"])


def test_analysing_a_past_period_again_keeps_the_findings_of_the_whole_history(
    own: dict[str, Any],
) -> None:
    # a late file or a correction makes the user (or the catch-up) analyse a past period
    # again: the findings must stay those of everything analysed, not wind back to the
    # period's end (the fouling finding lost its passed cleaning limit that way)
    store, site, source = own["store"], own["site"], own["source"]
    columns = ["branch", "kind", "start", "end", "message"]
    before = store.read_findings()[columns].sort_values(["branch", "kind"])
    early = DEMO_START + timedelta(days=20)
    summary = analyze(site, store, source, early, early + timedelta(days=1))
    after = store.read_findings()[columns].sort_values(["branch", "kind"])
    pd.testing.assert_frame_equal(after.reset_index(drop=True), before.reset_index(drop=True))
    assert sorted(f.kind for f in summary.findings) == sorted(before["kind"])


def test_resistance_findings_carry_their_cost(demo: dict[str, Any]) -> None:
    f = _found(demo, "B2-compressor", "restriction")[0]
    assert f.evidence["lost_flow_m3h"] > 0
    assert f.evidence["extra_energy_kwh_per_day"] > 0


def test_frozen_meter_alarm_within_six_hours(own: dict[str, Any]) -> None:
    """FT-310 freezes on day 120 at 03:00 UTC (demo_faults); ingest runs hourly.

    On its own copy of the store: alarms only look forward from their last sample, so a
    store another test judged up to the end would hide the freeze.
    """
    store, site, source = own["store"], own["site"], own["source"]
    frozen_at = DEMO_START + timedelta(days=120, hours=3)
    activated = None
    for hour in range(-24, 12):
        now = frozen_at + timedelta(hours=hour)
        events = evaluate_alarms(site, store, source, now=now)
        hits = [e for e in events if e.condition == "frozen FT-310" and e.action == "activated"]
        if hits and activated is None:
            activated = hits[0].time
            assert hour >= 0, "alarm before the meter froze"
    assert activated is not None
    assert activated - frozen_at <= timedelta(hours=6)  # issue 4 goal: within 6 h
    quiet = [e for e in store.alarm_events().to_dict(orient="records")
             if str(e["condition"]).startswith("frozen") and e["condition"] != "frozen FT-310"
             and e["to_state"] != "normal"
             and pd.Timestamp(e["time"]) >= pd.Timestamp(frozen_at - timedelta(hours=24))]
    assert quiet == []  # no live transmitter was called frozen


def test_alarm_state_is_kept(own: dict[str, Any]) -> None:
    store, site, source = own["store"], own["site"], own["source"]
    now = DEMO_START + timedelta(days=DAYS)
    evaluate_alarms(site, store, source, now=now)
    first = store.read_alarms()
    journal = len(store.alarm_events())
    evaluate_alarms(site, store, source, now=now)  # the same samples again
    again = store.read_alarms()
    low_flow = first[first["condition"] == "low_flow"]
    assert len(low_flow) == len([b for b in site.branches if b.flow_tag and b.min_flow_m3s > 0])
    assert list(first["state"]) == list(again["state"])
    assert len(store.alarm_events()) == journal


def test_cli_analyze_writes_findings_and_fits_files(
    demo: dict[str, Any], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    site_file = str(demo["paths"].site_file)
    findings, fits = tmp_path / "findings.json", tmp_path / "fits.csv"
    start = (DEMO_START + timedelta(days=DAYS - 2)).date().isoformat()
    end = (DEMO_START + timedelta(days=DAYS)).date().isoformat()
    assert main(["analyze", site_file, "--from", start, "--to", end, "--quiet",
                 "--findings", str(findings), "--fits", str(fits)]) == 0
    rows = json.loads(findings.read_text())
    assert {"branch", "kind", "start", "detected", "end", "confidence", "evidence",
            "message"} <= set(rows[0])
    table = pd.read_csv(fits)
    assert {"branch", "window_start", "window_end", "r", "r_low", "r_high",
            "samples", "step_at", "r_after_step"} <= set(table.columns)
    assert main(["status", site_file]) == 0
    assert "open findings" in capsys.readouterr().out


def _report_day(demo: dict[str, Any]) -> tuple[str, Any]:
    from datetime import UTC, datetime

    from monitor.app.morning_report import write_report
    from tests.monitor.test_report import _Page

    site, store = demo["site"], demo["store"]
    day = DEMO_START + timedelta(days=DAYS - 1)
    path = write_report(site, store, day=day, now=datetime.now(UTC))
    assert path.name == f"morning-{pd.Timestamp(day).tz_convert(site.timezone):%Y-%m-%d}.html"
    again = write_report(site, store, day=day, now=datetime.now(UTC))
    assert again == path  # one file per day: a rerun replaces it
    page = _Page()
    text = path.read_text()
    page.feed(text)
    return text, page


def test_morning_report_states_each_fault_with_its_numbers(demo: dict[str, Any]) -> None:
    """The report of the last day names the four open faults of the scenario, with the
    numbers of the simulated truth (demo_faults), and nothing on the clean branches."""
    import re

    text, page = _report_day(demo)
    assert "advises; it does not control" in text  # the safety caution (DESIGN §6)
    assert "data:image/png;base64," in text  # the trends are embedded
    heads = [re.match(r"(fouling|restriction|back-pressure change|instrument fault)"
                      r"(B\d-[a-z]+)", box) for box in page.findings]  # fmt: skip
    assert [(m.group(2), m.group(1)) if m else None for m in heads] == [
        ("B1-reactor", "fouling"),  # past its cleaning limit: first
        ("B2-compressor", "restriction"),
        ("B4-process", "back-pressure change"),
        ("B3-quench", "instrument fault"),
    ], page.findings
    fouling, restriction, back_pressure, instrument = page.findings
    # B1: r = 1 + 0.65·(t − 15 d)/140 d (linear ramp): 0.139 per month, limit 1.5 reached
    # on day 122.7 = 2026-08-01 17:00 UTC
    slope = re.search(r"rising (\d\.\d{3}) per month", fouling)
    assert slope and float(slope.group(1)) == pytest.approx(0.65 / 140 * 30, rel=0.05)
    passed = re.search(r"passed its cleaning limit 1\.50 on (\d{4}-\d\d-\d\d)", fouling)
    assert passed, fouling
    truth = DEMO_START + timedelta(days=15 + 140 * 0.5 / 0.65)
    assert abs(pd.Timestamp(passed.group(1), tz=demo["site"].timezone) - truth) <= timedelta(
        days=3)
    assert "Forecast: at or past the cleaning limit 1.50" in fouling
    assert "priority high" in fouling
    # B2: a valve left throttled, r ×1.5 on day 70 at 09:30 UTC (11:30 site time)
    assert "resistance ratio stepped from 1.00 to 1.50 (+50 %) on 2026-06-10 11:" in restriction
    lost = re.search(r"flow lost (\d+\.\d) m3/h", restriction)
    assert lost and float(lost.group(1)) > 0
    # B4: the set point raised 0.3 bar on day 95 at 14:00 UTC (16:00 site time)
    assert "moved by +0.30 bar on 2026-07-05 16:00" in back_pressure
    assert "step +0.30 bar" in back_pressure
    # B3: FT-310 frozen from day 120 03:00 UTC to day 124 (its windows are set aside)
    assert "FT-310 looks faulty (frozen)" in instrument
    assert "since 2026-07-30" in instrument
    # the branch table: the last fitted r of each branch against the simulated truth
    table = next(t for t in page.tables if t and t[0][:2] == ["branch", "resistance ratio r"])
    r_last = {row[0].split(" | ")[0]: float(row[1]) for row in table[1:]}
    r_true = {"B1-reactor": 1 + 0.65 * (DAYS - 1 + 0.5 - 15) / 140, "B2-compressor": 1.5}
    for name in ("B1-reactor", "B2-compressor", "B3-quench", "B4-process", "B5-spray",
                 "B6-chiller"):
        assert r_last[name] == pytest.approx(r_true.get(name, 1.0), abs=0.01), name


def test_status_tells_a_killed_run_from_a_running_one(
    demo: dict[str, Any], capsys: pytest.CaptureFixture[str]
) -> None:
    # A run killed outright cannot record its end: once a newer run of the same job has
    # started, status says the old one did not finish instead of "running" forever.
    from datetime import UTC, datetime

    store = demo["store"]
    killed = datetime(2030, 1, 1, 6, 0, tzinfo=UTC)
    store.record_job_run("analyze", killed, None, "running")
    store.record_job_run("analyze", killed + timedelta(minutes=5), None, "running")
    assert main(["status", str(demo["paths"].site_file)]) == 0
    out = capsys.readouterr().out
    assert "2030-01-01 06:00:00Z  analyze  did not finish" in out
    assert "2030-01-01 06:05:00Z  analyze  running" in out  # the newest may still run
    assert "open findings:" in out and "site time" in out
