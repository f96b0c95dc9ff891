"""Maintenance entries: checked against the fits after them, withdrawn or corrected, never
in the future.

The fit histories come from the generator of tests/monitor/test_diagnose.py (daily
windows, AR(1) day-to-day scatter, faults injected as a fouling ramp or a step of r).
What a cleaning should do to r is common practice: it takes the deposit off, so r falls
back near the clean baseline; a cleaning or valve setting after which r stays where it
was did not remove the cause, and the finding must stay open.
"""

from __future__ import annotations

import os
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa

from adapters import store as store_module
from adapters.migrations.tables import UTCDateTime
from adapters.store import SqlStore
from monitor.analysis.diagnose import DiagnosisSettings, diagnose
from monitor.app import cli
from tests.monitor.test_diagnose import T0, Fault, make_history

EXAMPLE_SITE = Path(__file__).resolve().parents[2] / "config" / "example-site.toml"


def _events(*rows: tuple[str, float]) -> pd.DataFrame:
    return pd.DataFrame({
        "branch": ["CW-3"] * len(rows), "kind": [k for k, _ in rows],
        "time": pd.to_datetime([pd.Timestamp(T0) + timedelta(days=d) for _, d in rows]),
    })  # fmt: skip


def _run(hist: pd.DataFrame, events: pd.DataFrame | None = None, **kw: Any) -> list[Any]:
    return diagnose(hist, maintenance=events, now=hist["window_end"].max(),
                    settings=DiagnosisSettings(**kw))  # fmt: skip


def _medians(hist: pd.DataFrame, day: int, n: int = 3) -> tuple[float, float]:
    """Median r of the n windows before day and of the n windows from it (the fits)."""
    r = hist["r"].to_numpy()
    return float(np.median(r[day - n : day])), float(np.median(r[day : day + n]))


def _fouled(seed: int = 21, days: int = 260) -> pd.DataFrame:
    # a ramp from day 40 to r = 1.6 at day 130, then flat: past the 1.5 limit
    return make_history(days, seed=seed, faults=(Fault("ramp", 40.0, 1.6, 90.0),))


def _cleaned_from(hist: pd.DataFrame, day: int, seed: int, factor: float = 1.0) -> pd.DataFrame:
    """r from *day* on as the same branch clean (times *factor*)."""
    clean = make_history(len(hist), seed=seed)["r"].to_numpy()
    r = hist["r"].to_numpy().copy()
    r[day:] = clean[day:] * factor
    return hist.assign(r=r).drop(columns=[c for c in hist.columns if c.startswith("sum_")])


# -- item 1: an entry ends a finding only when the fits show the change -----------------


def test_cleaning_without_effect_keeps_fouling_open_and_says_so() -> None:
    hist = _fouled()
    found = _run(hist, _events(("cleaned", 150)))
    fouling = [f for f in found if f.kind == "fouling"]
    assert len(fouling) == 1 and fouling[0].end is None, found
    before, after = _medians(hist, 150)
    # the numbers in the message are those of the fits either side of the entry
    assert (f"the cleaning logged on 2025-05-31 had no visible effect: r {before:.2f} before, "
            f"{after:.2f} after") in fouling[0].message.lower()  # fmt: skip
    assert fouling[0].evidence["event_r_before"] == pytest.approx(before)
    assert fouling[0].evidence["event_r_after"] == pytest.approx(after)
    # the same history without the entry gives the same findings but for the note
    plain = [f for f in _run(hist) if f.kind == "fouling"]
    assert plain[0].start == fouling[0].start and plain[0].end is None


def test_cleaning_that_worked_ends_fouling_at_the_entry_and_starts_a_new_baseline() -> None:
    hist = _cleaned_from(_fouled(seed=22), 150, seed=22)
    found = _run(hist, _events(("cleaned", 150)))
    assert [f.kind for f in found] == ["fouling"], found
    assert found[0].end == T0 + timedelta(days=150)
    assert "no visible effect" not in found[0].message
    # a new baseline after the cleaning: a later ramp is referred to the clean level
    again = hist.copy()
    days = np.arange(len(again))
    again["r"] = again["r"] * np.where(days >= 190, 1 + 0.5 * np.clip((days - 190) / 50, 0, 1),
                                       1.0)  # fmt: skip
    later = [f for f in _run(again, _events(("cleaned", 150))) if f.kind == "fouling"]
    assert len(later) == 2 and later[1].end is None, later
    assert later[1].evidence["r_baseline"] == pytest.approx(1.0, abs=0.03)


def test_cleaning_that_took_off_only_part_of_the_rise_keeps_the_finding() -> None:
    # r 1.6 before; 1.45 after: below the limit, but most of the rise is still there
    hist = _cleaned_from(_fouled(seed=23), 150, seed=23, factor=1.45)
    found = [f for f in _run(hist, _events(("cleaned", 150))) if f.kind == "fouling"]
    assert found and found[0].end is None, found
    before, after = _medians(hist, 150)
    assert "took off only part of the rise (baseline " in found[0].message
    assert f"r {before:.2f} before, {after:.2f} after" in found[0].message


def test_valve_set_without_effect_keeps_the_restriction_open() -> None:
    hist = make_history(170, seed=24, faults=(Fault("step", 100.0, 0.30),))
    found = _run(hist, _events(("valve_set", 120)))
    assert [f.kind for f in found] == ["restriction"], found
    assert found[0].end is None
    before, after = _medians(hist, 120)
    assert (f"The valve setting logged on 2025-05-01 had no visible effect: r {before:.2f} "
            f"before, {after:.2f} after.") in found[0].message  # fmt: skip


def test_valve_set_that_reopened_the_valve_ends_the_restriction_at_the_entry() -> None:
    hist = make_history(170, seed=25, faults=(Fault("step", 100.0, 0.30),))
    hist = _cleaned_from(hist, 120, seed=25)
    found = _run(hist, _events(("valve_set", 120)))
    assert [f.kind for f in found] == ["restriction"], found
    assert found[0].end == T0 + timedelta(days=120)


def test_an_entry_too_recent_to_check_keeps_the_finding_and_says_it_waits() -> None:
    hist = _fouled(days=152)  # two windows after a cleaning on day 150; three decide
    found = [f for f in _run(hist, _events(("cleaned", 150))) if f.kind == "fouling"]
    assert found and found[0].end is None
    assert "is not checked yet (2 of 3 windows after it fitted)" in found[0].message


def test_withdrawn_entries_are_ignored_by_the_diagnosis() -> None:
    hist = _cleaned_from(_fouled(seed=26), 150, seed=26)
    events = _events(("cleaned", 150)).assign(withdrawn_at=pd.Timestamp("2025-06-10", tz="UTC"))
    with_withdrawn = _run(hist, events)
    without = _run(hist)
    assert [(f.kind, f.start, f.end) for f in with_withdrawn] == [
        (f.kind, f.start, f.end) for f in without
    ]
    # and the entry in force does end it (so the withdrawal is what changed the result)
    assert _run(hist, events.drop(columns="withdrawn_at"))[0].end == T0 + timedelta(days=150)


# -- item 2: the store keeps withdrawn and corrected entries ----------------------------


@pytest.fixture(
    params=["sqlite", pytest.param("postgresql", marks=pytest.mark.server),
            pytest.param("mariadb", marks=pytest.mark.server)]
)  # fmt: skip
def db(request: pytest.FixtureRequest, tmp_path: Path, unique_name: str) -> Any:
    """(url, schema) of this test's own database; servers drop theirs afterwards."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'bw.db'}", None
        return
    url = request.getfixturevalue("postgres_url" if request.param == "postgresql"
                                  else "mariadb_url")  # fmt: skip
    yield url, unique_name
    engine = sa.create_engine(url)
    quoted = engine.dialect.identifier_preparer.quote_identifier(unique_name)
    with engine.begin() as conn:
        what = "SCHEMA" if engine.dialect.name == "postgresql" else "DATABASE"
        cascade = " CASCADE" if engine.dialect.name == "postgresql" else ""
        conn.exec_driver_sql(f"DROP {what} IF EXISTS {quoted}{cascade}")
    engine.dispose()


NOW = datetime(2026, 3, 1, 12, 0, tzinfo=UTC)


def test_withdraw_and_correct_keep_every_entry(db: tuple[str, str | None]) -> None:
    store = SqlStore(db[0], schema=db[1])
    try:
        t = NOW - timedelta(days=10)
        a = store.add_maintenance("CW-3", "cleaned", t, "jetted", now=NOW)
        assert store.add_maintenance("CW-3", "cleaned", t, "jetted twice", now=NOW) == a
        b = store.add_maintenance("CW-4", "valve_set", t, "", now=NOW)
        store.withdraw_maintenance(b, by="J. Ortega", note="wrong branch", now=NOW)
        c = store.correct_maintenance(a, time=t + timedelta(hours=6), by="J. Ortega", now=NOW)
        in_force = store.maintenance()
        assert list(in_force["id"]) == [c]
        assert in_force["time"].iloc[0] == t + timedelta(hours=6)
        assert in_force["note"].iloc[0] == "jetted twice"  # kept when only the time changes
        assert int(in_force["replaces"].iloc[0]) == a
        every = store.maintenance(include_withdrawn=True).set_index("id")
        assert sorted(every.index) == sorted([a, b, c])  # nothing deleted
        assert every.loc[b, "withdrawn_by"] == "J. Ortega"
        assert every.loc[b, "withdrawn_note"] == "wrong branch"
        assert every.loc[b, "withdrawn_at"] == NOW
        assert every.loc[a, "withdrawn_note"] == f"corrected: replaced by entry {c}"
        assert pd.isna(every.loc[c, "withdrawn_at"])
        with pytest.raises(ValueError, match="already withdrawn"):
            store.withdraw_maintenance(a, by="x", now=NOW)
        with pytest.raises(ValueError, match="does not exist"):
            store.correct_maintenance(999, note="x", by="x", now=NOW)
        with pytest.raises(ValueError, match="in the future"):
            store.add_maintenance("CW-3", "cleaned", NOW + timedelta(hours=1), now=NOW)
        with pytest.raises(ValueError, match="in the future"):
            store.correct_maintenance(c, time=NOW + timedelta(days=1), by="x", now=NOW)
        assert list(store.maintenance()["id"]) == [c]  # the refused correction changed nothing
    finally:
        store.close()


def test_upgrade_from_0005_keeps_the_logged_entries(db: tuple[str, str | None]) -> None:
    from alembic import command
    from alembic.config import Config

    old = SqlStore(db[0], schema=db[1], migrate=False)
    cfg = Config()
    cfg.set_main_option("script_location", str(store_module._MIGRATIONS))
    with old.engine.begin() as conn:  # a database left at the version before this one
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "0005_tag_case")
    old_t = sa.Table("maintenance", sa.MetaData(), sa.Column("id", sa.Integer),
                     sa.Column("branch", sa.String(100)), sa.Column("kind", sa.String(40)),
                     sa.Column("time", UTCDateTime()), sa.Column("note", sa.Text))
    with old.engine.begin() as conn:
        conn.execute(old_t.insert(), [
            {"branch": "CW-3", "kind": "cleaned", "time": NOW - timedelta(days=40),
             "note": "jetted"},
            {"branch": "CW-4", "kind": "valve_set", "time": NOW - timedelta(days=20),
             "note": None},
        ])  # fmt: skip
    old.close()
    new = SqlStore(db[0], schema=db[1])  # opening migrates to the newest version
    try:
        log = new.maintenance()
        assert list(log["branch"]) == ["CW-3", "CW-4"] and log["note"].iloc[0] == "jetted"
        assert log["withdrawn_at"].isna().all() and log["logged_at"].isna().all()
        first = int(log["id"].iloc[0])
        new.withdraw_maintenance(first, by="x", now=NOW)
        # the old unique key is gone: the same work logged again is a new entry
        again = new.add_maintenance("CW-3", "cleaned", NOW - timedelta(days=40), now=NOW)
        assert again != first and len(new.maintenance(include_withdrawn=True)) == 3
    finally:
        new.close()


# -- item 2: the log verb ---------------------------------------------------------------


@pytest.fixture
def site_file(tmp_path: Path) -> Path:
    path = tmp_path / "site.toml"
    path.write_text(EXAMPLE_SITE.read_text())
    (tmp_path / "inbox").mkdir()
    return path


def test_log_verb_lists_ids_withdraws_and_corrects(
    site_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    log = ["log", str(site_file)]
    assert cli.main([*log, "B1-reactor", "--cleaned", "2026-01-14", "--note", "jetted"]) == 0
    assert cli.main([*log, "B2-compressor", "--valve-set", "2026-01-15 09:30"]) == 0
    assert cli.main([*log, "--correct", "1", "--time", "2026-01-14 13:00"]) == 0
    assert cli.main([*log, "--withdraw", "2", "--by", "shift-B", "--note", "not done"]) == 0
    capsys.readouterr()
    assert cli.main(log) == 0
    out = capsys.readouterr().out
    # site time (Europe/Berlin in the example site file): the corrected entry alone
    assert "   3  2026-01-14 13:00  B1-reactor       cleaned           jetted" in out
    assert "[corrects entry 1]" in out and "B2-compressor" not in out
    assert cli.main([*log, "--all"]) == 0
    out = capsys.readouterr().out
    assert "by shift-B: not done]" in out and "corrected: replaced by entry 3" in out
    store = SqlStore(f"sqlite:///{site_file.parent / 'var' / 'branchwatch.db'}")
    try:
        assert len(store.maintenance(include_withdrawn=True)) == 3
    finally:
        store.close()


@pytest.mark.parametrize(
    ("argv", "says"),
    [
        (["B1-reactor", "--cleaned", "2100-01-01"], "--cleaned 2100-01-01 00:00"),
        (["--withdraw", "7"], "maintenance entry 7 does not exist"),
        (["--correct", "1"], "needs the corrected --time and/or --note"),
        (["--time", "2026-01-01"], "--time goes with --correct ID"),
    ],
)
def test_log_verb_refuses_with_one_line_and_exit_2(
    site_file: Path, capsys: pytest.CaptureFixture[str], argv: list[str], says: str
) -> None:
    assert cli.main(["log", str(site_file), "B1-reactor", "--cleaned", "2026-01-14"]) == 0
    capsys.readouterr()
    assert cli.main(["log", str(site_file), *argv]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and says in err, err
    store = SqlStore(f"sqlite:///{site_file.parent / 'var' / 'branchwatch.db'}")
    try:
        assert len(store.maintenance()) == 1  # nothing lost, nothing added
    finally:
        store.close()


# -- item 1 end to end: the simulated site, its exports, ingest, analysis ---------------


@pytest.mark.slow
def test_simulated_site_logged_cleanings_checked_against_the_fits(tmp_path: Path) -> None:
    """Two branches of the example site foul (simulated truth: linear ramps to r 1.6 by
    day 50); both cleanings are logged on day 62, but only B5's really happened (the
    simulator's Cleaning ends its ramp). B1's finding stays open and says so; B5's ends
    at its entry. A third entry, withdrawn, is not read."""
    from model.scenario import Cleaning, FoulingRamp
    from monitor.app.demo import simulate_site, write_exports
    from monitor.app.ingest import ingest, open_source
    from monitor.app.jobs import analyze
    from monitor.site.config import load_site

    start, days = datetime(2026, 4, 1, tzinfo=UTC), 75
    day = timedelta(days=1)
    path = tmp_path / "site.toml"
    path.write_text(EXAMPLE_SITE.read_text())
    site = load_site(path)
    cleaned = start + 62 * day + timedelta(hours=10)
    sim = simulate_site(site, start, start + days * day, step_s=600.0, seed=11, faults=[
        FoulingRamp("B1-reactor", start + 16 * day, days=34, r_end=1.6),
        FoulingRamp("B5-spray", start + 16 * day, days=34, r_end=1.6),
        Cleaning("B5-spray", cleaned),
    ])  # fmt: skip
    write_exports(site, sim, tmp_path / "inbox", spoil=False)
    for f in (tmp_path / "inbox").iterdir():  # settled exports, not being written
        os.utime(f, (f.stat().st_mtime - 3600, f.stat().st_mtime - 3600))
    store = SqlStore(site.store_url)
    source = open_source(site)
    try:
        ingest(site, store, source)
        # logged at the end of the shift; times are what the engineer wrote down
        store.add_maintenance("B1-reactor", "cleaned", cleaned + timedelta(hours=6))
        store.add_maintenance("B5-spray", "cleaned", cleaned + timedelta(hours=6))
        wrong = store.add_maintenance("B3-quench", "cleaned", start + 40 * day)
        store.withdraw_maintenance(wrong, by="test", note="no work on B3")
        result = analyze(site, store, source, start, start + days * day)
        fits = store.read_fits()
    finally:
        source.close()
        store.close()
    by = {(f.branch, f.kind): f for f in result.findings}
    b1, b5 = by[("B1-reactor", "fouling")], by[("B5-spray", "fouling")]
    assert b1.end is None and b5.end == cleaned + timedelta(hours=6), result.findings
    r = fits[fits["branch"] == "B1-reactor"].set_index("window_start")["r"].dropna()
    # the windows (site days) that start after the entry: the first three judge it
    k = int(np.searchsorted(r.index, pd.Timestamp(cleaned + timedelta(hours=6))))
    before, after = float(np.median(r.iloc[k - 3 : k])), float(np.median(r.iloc[k : k + 3]))
    assert (f"The cleaning logged on 2026-06-02 had no visible effect: r {before:.2f} before, "
            f"{after:.2f} after.") in b1.message  # fmt: skip
    assert not [f for f in result.findings if f.branch == "B3-quench"]
    # the cleaning that happened shows in the fits: r back near 1 after it
    r5 = fits[fits["branch"] == "B5-spray"].set_index("window_start")["r"].dropna()
    k5 = int(np.searchsorted(r5.index, pd.Timestamp(cleaned + timedelta(hours=6))))
    assert float(np.median(r5.iloc[k5 : k5 + 3])) < 1.1
