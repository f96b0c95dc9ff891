"""The maintenance log's operations (`monitor.app.maintenance_log`) on a SQLite store of the
example site: each returns its record, and work dated in the future is refused before
the store is written. Logging work once it is done is common practice (a log records
what happened); the few minutes of slack allow for clocks that differ a little.
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from adapters.store import SqlStore
from monitor.app.maintenance_log import (
    FUTURE_SLACK,
    FutureWorkError,
    MaintenanceCorrected,
    MaintenanceRecorded,
    MaintenanceWithdrawn,
    correct_entry,
    record_entry,
    withdraw_entry,
)
from monitor.site.config import Site, load_site

EXAMPLE_SITE = Path(__file__).resolve().parents[2] / "config" / "example-site.toml"
NOW = datetime(2026, 3, 2, 8, 0, tzinfo=UTC)  # the operations' clock; invented
DONE = datetime(2026, 3, 1, 13, 30, tzinfo=UTC)  # when the work was done; invented


@pytest.fixture
def site(tmp_path: Path) -> Site:
    path = tmp_path / "site.toml"
    path.write_text(EXAMPLE_SITE.read_text())
    return load_site(path)


@pytest.fixture
def store(tmp_path: Path) -> Iterator[SqlStore]:
    s = SqlStore(f"sqlite:///{tmp_path / 'log.db'}")
    yield s
    s.close()


def test_recorded_work_comes_back_as_its_record(site: Site, store: SqlStore) -> None:
    done = record_entry(site, store, "B1-reactor", "cleaned", DONE, note="jetted", now=NOW)
    assert done == MaintenanceRecorded(done.entry, "B1-reactor", "cleaned", DONE)
    stored = store.maintenance()
    assert list(stored["id"]) == [done.entry] and list(stored["note"]) == ["jetted"]


@pytest.mark.parametrize("ahead", [FUTURE_SLACK + timedelta(seconds=1), timedelta(days=1)])
def test_work_after_now_is_refused_and_nothing_is_written(
    site: Site, store: SqlStore, ahead: timedelta
) -> None:
    first = record_entry(site, store, "B1-reactor", "cleaned", DONE, now=NOW)
    with pytest.raises(FutureWorkError) as refused:
        record_entry(site, store, "B1-reactor", "valve_set", NOW + ahead, now=NOW)
    assert refused.value.when == NOW + ahead
    with pytest.raises(FutureWorkError):
        correct_entry(store, first.entry, time=NOW + ahead, note=None, by="shift-B", now=NOW)
    stored = store.maintenance(include_withdrawn=True)
    assert list(stored["id"]) == [first.entry]  # the entry stands, uncorrected
    assert stored["withdrawn_at"].isna().all()


def test_an_unknown_branch_is_refused_with_the_site_s_branches(site: Site,
                                                               store: SqlStore) -> None:
    with pytest.raises(KeyError, match="B1-reactor"):
        record_entry(site, store, "B9-nowhere", "cleaned", DONE, now=NOW)
    assert store.maintenance(include_withdrawn=True).empty


def test_correct_and_withdraw_say_which_entries(site: Site, store: SqlStore) -> None:
    first = record_entry(site, store, "B1-reactor", "cleaned", DONE, now=NOW)
    fixed = correct_entry(store, first.entry, time=DONE - timedelta(hours=2), note=None,
                          by="shift-B", now=NOW)
    assert fixed == MaintenanceCorrected(first.entry, fixed.replaced_by)
    assert fixed.replaced_by != first.entry
    assert withdraw_entry(store, fixed.replaced_by, by="shift-B", note="not done") == \
        MaintenanceWithdrawn(fixed.replaced_by)
    assert store.maintenance().empty  # both withdrawn: nothing in force
    every = store.maintenance(include_withdrawn=True).set_index("id")
    assert every.loc[fixed.replaced_by, "replaces"] == first.entry
