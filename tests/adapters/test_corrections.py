"""Historian corrections in the results store: a stored reading that a later export brings
with another value is refused (first value kept) or applied, and journalled either way —
the same suite on SQLite, PostgreSQL and MariaDB; and the migration that adds the journal.
A correction from a CSV export is journalled with the file line that brought it, numbered
as the quarantine numbers lines (the header is line 1).
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from alembic import command
from alembic.config import Config

from adapters.csv_source import CsvSource
from adapters.migrations.dialects import native_times
from adapters.records import Batch, TagSpec, empty_quarantine, values_differ
from adapters.store import SqlStore
from tests.adapters.ingest_helpers import write

T0 = datetime(2026, 2, 9, 6, tzinfo=UTC)
TAGS = ["FT-311", "PT-301"]


def _readings(minutes: int = 30) -> pd.DataFrame:
    """Header pressure about 3.1 bar and a branch flow about 42 m3/h, in SI."""
    times = pd.date_range(T0, periods=minutes, freq="min", tz="UTC")
    n = len(times)
    return pd.DataFrame({
        "time": np.concatenate([times, times]),
        "tag": pd.Series(["FT-311"] * n + ["PT-301"] * n, dtype=object),
        "value": np.concatenate([0.01167 + 1e-5 * np.arange(n), 3.1e5 + 10.0 * np.arange(n)]),
        "good": True,
    })


def _batch(frame: pd.DataFrame, key: str = "exports/feb-09.csv") -> Batch:
    return Batch(frame, empty_quarantine(), key, {"offset": 1})


def _changed(frame: pd.DataFrame, rows: list[int], factor: float = 1.05) -> pd.DataFrame:
    out = frame.copy()
    out.loc[rows, "value"] = out.loc[rows, "value"] * factor
    return out


def _stored(store: SqlStore) -> pd.DataFrame:
    return store.read_readings(TAGS, T0 - timedelta(hours=1), T0 + timedelta(days=1))


def test_refuse_keeps_the_first_value_and_journals_once(store: SqlStore) -> None:
    first = _readings()
    assert store.store_batch(_batch(first), source="csv") == 60
    before = _stored(store)
    again = _changed(first, [3, 40])
    out = store.write_batch(_batch(again, "exports/feb-09-reissued.csv"), source="csv")
    assert (out.stored, out.applied, out.refused) == (0, 0, 2)
    assert out.example is not None and "FT-311" in out.example
    pd.testing.assert_frame_equal(_stored(store), before)  # the first value is kept
    journal = store.read_corrections()
    assert journal["action"].tolist() == ["refused", "refused"]
    assert journal["tag"].tolist() == ["FT-311", "PT-301"]
    assert journal["old_value"].tolist() == pytest.approx(first["value"][[3, 40]].tolist())
    assert journal["new_value"].tolist() == pytest.approx(again["value"][[3, 40]].tolist())
    assert journal["origin"].tolist() == ["exports/feb-09-reissued.csv"] * 2
    assert journal["reanalysed_at"].isna().all() and journal["line"].isna().all()
    # the same export read again (or a SQL source's overlap) adds nothing
    out = store.write_batch(_batch(again), source="csv")
    assert (out.stored, out.refused, out.example) == (0, 0, None)
    assert len(store.read_corrections()) == 2
    # a third value for the same reading is another correction
    out = store.write_batch(_batch(_changed(first, [3], 1.10)), source="csv")
    assert out.refused == 1
    assert store.correction_counts() == {"applied": 0, "refused": 3, "pending": 0}


def test_apply_replaces_the_value_with_an_audit_row(store: SqlStore) -> None:
    first = _readings()
    store.store_batch(_batch(first), source="csv")
    again = _changed(first, [5, 6, 45])
    again.loc[7, "good"] = False  # a changed quality is a correction too
    out = store.write_batch(_batch(again), source="csv", corrections="apply")
    assert (out.stored, out.applied, out.refused) == (0, 4, 0)
    stored = _stored(store).sort_values(["tag", "time"], ignore_index=True)
    expect = again.sort_values(["tag", "time"], ignore_index=True)
    assert stored["value"].tolist() == pytest.approx(expect["value"].tolist(), rel=1e-12)
    assert stored["good"].tolist() == expect["good"].tolist()
    journal = store.read_corrections(action="applied")
    assert len(journal) == 4 and journal["reanalysed_at"].isna().all()
    quality = journal[journal["old_good"] != journal["new_good"]]
    assert len(quality) == 1 and quality["old_value"].iloc[0] == quality["new_value"].iloc[0]
    assert store.correction_counts() == {"applied": 4, "refused": 0, "pending": 4}
    # the store now holds the corrected values: the same export again changes nothing
    out = store.write_batch(_batch(again), source="csv", corrections="apply")
    assert (out.applied, out.refused) == (0, 0)
    pending = store.read_corrections(pending=True)
    assert store.mark_reanalysed(pending["id"].tolist()[:3]) == 3
    assert store.correction_counts()["pending"] == 1
    assert store.mark_reanalysed(pending["id"].tolist()) == 1  # marked ones stay as they are
    assert store.read_corrections(pending=True).empty


def test_a_float_round_trip_is_not_a_correction(store: SqlStore) -> None:
    first = _readings()
    first.loc[0, "value"] = 0.0
    store.store_batch(_batch(first), source="csv")
    # bar -> Pa -> text with 9 significant digits -> back: relative error ~1e-9
    trip = first.copy()
    trip["value"] = [float(f"{v:.9g}") for v in trip["value"]]
    trip.loc[0, "value"] = 4e-10  # within the absolute tolerance of a zero
    out = store.write_batch(_batch(trip), source="csv", corrections="apply")
    assert (out.applied, out.refused) == (0, 0)
    assert store.read_corrections().empty
    bigger = first.copy()
    bigger.loc[10, "value"] *= 1 + 1e-5  # 10 ppm: beyond the 1 ppm tolerance
    assert store.write_batch(_batch(bigger), source="csv").refused == 1


def test_values_differ_tolerance() -> None:
    old = np.array([3.1e5, 3.1e5, 0.0, 0.0, np.nan, np.nan, 0.0117])
    new = np.array([3.1e5 + 0.3, 3.1e5 + 0.32, 5e-10, 2e-9, np.nan, 1.0, 0.0117 * (1 + 2e-6)])
    # 1e-6 relative + 1e-9 absolute (the store's stated tolerance): 0.31 Pa at 3.1 bar
    assert values_differ(old, new).tolist() == [False, True, False, True, False, True, True]
    # no overflow warning (warnings are errors here) at the ends of the float range
    assert values_differ(np.array([1e308, 1e308]), np.array([-1e308, 1e308])).tolist() == [
        True, False]


def test_a_reading_stored_without_value_then_given_one(store: SqlStore) -> None:
    first = _readings(5)
    first.loc[2, "value"] = np.nan  # the historian had no value, stored as NULL
    store.store_batch(_batch(first), source="csv")
    fixed = _readings(5)
    out = store.write_batch(_batch(fixed), source="csv", corrections="apply")
    assert out.applied == 1
    journal = store.read_corrections()
    assert np.isnan(journal["old_value"].iloc[0])
    assert journal["new_value"].iloc[0] == pytest.approx(fixed["value"].iloc[2])


def test_new_and_corrected_readings_in_one_batch(store: SqlStore) -> None:
    store.store_batch(_batch(_readings(20)), source="csv")
    grown = _changed(_readings(30), [1])  # ten minutes more, one stored value changed
    out = store.write_batch(_batch(grown), source="csv", corrections="apply")
    assert (out.stored, out.applied) == (20, 1)
    assert len(_stored(store)) == 60


def test_unknown_policy_is_refused(store: SqlStore) -> None:
    with pytest.raises(ValueError, match="corrections must be one of"):
        store.write_batch(_batch(_readings(2)), source="csv", corrections="latest")
    assert _stored(store).empty


def _alembic(store: SqlStore, action: str, target: str) -> None:
    cfg = Config()
    cfg.set_main_option("script_location", str(Path(__file__).resolve().parents[2]
                                               / "adapters" / "migrations"))
    with store.engine.begin() as conn:
        cfg.attributes["connection"] = conn
        getattr(command, action)(cfg, target)


def test_migration_0008_up_down_and_up_keeps_readings(
    store_opener: Callable[..., SqlStore],
) -> None:
    store = store_opener(migrate=False)
    _alembic(store, "upgrade", "0007_outbox")
    assert "corrections" not in sa.inspect(store.engine).get_table_names()
    with store.engine.begin() as conn:  # a reading stored under the old schema
        conn.execute(sa.text("INSERT INTO readings (tag, time, value, good) VALUES "
                             "('FT-311', :t, 0.0117, :g)"),
                     {"t": native_times(pd.Series(pd.DatetimeIndex([T0])), store.dialect)[0],
                      "g": True})
    _alembic(store, "upgrade", "head")
    assert "corrections" in sa.inspect(store.engine).get_table_names()
    assert len(store.read_readings(["FT-311"], T0, T0 + timedelta(minutes=1))) == 1
    store.write_batch(_batch(pd.DataFrame({
        "time": pd.DatetimeIndex([T0]), "tag": pd.Series(["FT-311"], dtype=object),
        "value": [0.0120], "good": [True]})), source="csv")
    assert len(store.read_corrections()) == 1
    _alembic(store, "downgrade", "0007_outbox")
    assert "corrections" not in sa.inspect(store.engine).get_table_names()
    _alembic(store, "upgrade", "head")
    assert store.read_corrections().empty
    assert len(store.read_readings(["FT-311"], T0, T0 + timedelta(minutes=1))) == 1


def test_one_instant_stored_as_two_texts_does_not_stop_ingest(tmp_path: Path) -> None:
    # SQLite keys the time as text: a row written by another program in ISO 'T' form is
    # the same instant as the store's own; the comparison takes the first
    store = SqlStore(f"sqlite:///{tmp_path / 'b.db'}")
    try:
        store.store_batch(_batch(_readings(3)), source="csv")
        with store.engine.begin() as conn:
            conn.execute(sa.text("INSERT INTO readings (tag, time, value, good) VALUES "
                                 "('FT-311', '2026-02-09T06:00:00+00:00', 0.5, 1)"))
        out = store.write_batch(_batch(_readings(3)), source="csv")
        assert (out.stored, out.refused) == (0, 0)
    finally:
        store.close()


def _ingest_csv(store: SqlStore, inbox: Path, corrections: str) -> int:
    """Every batch of the CSV exports in *inbox* into *store*; returns the corrections."""
    source = CsvSource([TagSpec("FT-311", "m3/h", "flow"), TagSpec("PT-301", "bar", "pressure")],
                       path=inbox, settle_seconds=0)
    met = 0
    for batch in source.batches(store.cursors(source.name)):
        out = store.write_batch(batch, source=source.name, corrections=corrections)
        met += out.applied + out.refused
    return met


@pytest.mark.parametrize("corrections", ["refuse", "apply"])
def test_a_csv_correction_is_journalled_with_its_file_line(
    store: SqlStore, tmp_path: Path, corrections: str
) -> None:
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    write(inbox / "feb-09.csv", "timestamp,FT-311,PT-301\n"
          "2026-02-09T06:00:00Z,42.0,3.10\n"
          "2026-02-09T06:01:00Z,42.1,3.11\n"
          "2026-02-09T06:02:00Z,42.2,3.12\n")
    assert _ingest_csv(store, inbox, corrections) == 0
    # the reissue starts a minute earlier, so each reading sits one line lower than before
    write(inbox / "feb-09-reissued.csv", "timestamp,FT-311,PT-301\n"
          "2026-02-09T05:59:00Z,41.9,3.09\n"
          "2026-02-09T06:00:00Z,42.0,3.10\n"
          "2026-02-09T06:01:00Z,40.0,3.11\n"
          "2026-02-09T06:02:00Z,42.2,3.20\n")
    assert _ingest_csv(store, inbox, corrections) == 2
    journal = store.read_corrections()
    assert journal["tag"].tolist() == ["FT-311", "PT-301"]
    assert journal["line"].tolist() == [4, 5]
    assert journal["origin"].str.endswith("feb-09-reissued.csv").all()


def test_a_long_csv_correction_names_the_last_line_of_its_reading(
    store: SqlStore, tmp_path: Path
) -> None:
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    write(inbox / "a.csv", "timestamp,tag,value\n"
          "2026-02-09T06:00:00Z,FT-311,42.0\n"
          "2026-02-09T06:00:00Z,PT-301,3.10\n")
    assert _ingest_csv(store, inbox, "apply") == 0
    # a reading given twice in one file: the last row is the one stored, and named
    write(inbox / "b.csv", "timestamp,tag,value\n"
          "2026-02-09T06:00:00Z,PT-301,3.10\n"
          "2026-02-09T06:00:00Z,FT-311,41.0\n"
          "2026-02-09T06:01:00Z,FT-311,42.5\n"
          "2026-02-09T06:00:00Z,FT-311,40.0\n")
    assert _ingest_csv(store, inbox, "apply") == 1
    journal = store.read_corrections()
    assert journal["line"].tolist() == [5]
    assert journal["new_value"].tolist() == pytest.approx([40.0 / 3600])  # 1 m3/h = 1/3600 m3/s
