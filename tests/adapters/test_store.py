"""Results store: the same suite on SQLite, PostgreSQL and MariaDB.

Every server test works in a schema (PostgreSQL) or database (MariaDB) of its own, named
by `unique_name` and dropped afterwards (the `store_opener` and `store` fixtures of
tests/conftest.py), so runs never see each other's rows.
"""

from __future__ import annotations

import math
import pickle
import signal
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext

from adapters import store as store_module
from adapters import store_readings
from adapters.base import ResultsStore, StoreError
from adapters.fit_record import WindowFit
from adapters.migrations import tables
from adapters.records import Batch
from adapters.store import SqlStore
from monitor.analysis.quality import TagLimits, screen

T0 = datetime(2025, 3, 1, tzinfo=UTC)
ALL_TABLES = {
    "window_checks",
    "header_balance",
    "readings",
    "cursors",
    "quarantine",
    "fits",
    "findings",
    "alarms",
    "alarm_events",
    "maintenance",
    "job_runs",
    "data_health",
    "corrections",
    "branchwatch_schema_version",
}


def _readings(n_minutes: int, tags: list[str], start: datetime = T0) -> pd.DataFrame:
    times = pd.date_range(start, periods=n_minutes, freq="min", tz="UTC")
    frame = pd.DataFrame(
        {
            "time": np.repeat(times, len(tags)),
            "tag": tags * n_minutes,
            "value": np.arange(n_minutes * len(tags), dtype=float) * 0.5,
            "good": True,
        }
    )
    frame["tag"] = frame["tag"].astype(object)
    return frame


def _batch(readings: pd.DataFrame, key: str = "inbox/a.csv", offset: int = 100) -> Batch:
    quarantined = pd.DataFrame(
        {
            "origin": [key, key],
            "line": [7, 9],
            "reason": ["bad_number", "bad_time"],
            "raw": ["2025-03-01T00:07Z,FT-203,abc", "yesterday,FT-203,1.0"],
        }
    )
    return Batch(readings, quarantined, key, {"offset": offset, "sha256": "ab" * 32})


def _all(store: SqlStore, tags: list[str]) -> pd.DataFrame:
    return store.read_readings(tags, T0 - timedelta(days=1), T0 + timedelta(days=30))


def test_migrations_create_schema_and_reopen_is_a_noop(
    store_opener: Callable[..., SqlStore],
) -> None:
    first = store_opener()
    inspector = sa.inspect(first.engine)
    assert set(inspector.get_table_names()) >= ALL_TABLES
    with first.engine.connect() as conn:
        assert (
            MigrationContext.configure(
                conn, opts={"version_table": "branchwatch_schema_version"}
            ).get_current_revision()
            == "0008_corrections"
        )
        # The tables the store queries through agree with what the migration built.
        diff = compare_metadata(MigrationContext.configure(conn), tables.metadata)
    # Only our version table is not in the metadata; no table, column, type or index differs.
    assert [d[1].name for d in diff] == ["branchwatch_schema_version"]
    first.store_batch(_batch(_readings(3, ["FT-203"])), source="csv")
    second = store_opener()  # migrating an up-to-date schema changes nothing, loses nothing
    assert len(_all(second, ["FT-203"])) == 3
    with second.engine.connect() as conn:
        versions = conn.execute(sa.text("SELECT version_num FROM branchwatch_schema_version"))
        assert [v for (v,) in versions] == ["0008_corrections"]


def test_store_batch_is_idempotent(store: SqlStore) -> None:
    assert isinstance(store, ResultsStore)
    tags = ["FT-203", "PT-100"]
    batch = _batch(_readings(60, tags))
    assert store.store_batch(batch, source="csv") == 120
    first = _all(store, tags)
    assert store.store_batch(batch, source="csv") == 0  # same batch again: nothing new
    pd.testing.assert_frame_equal(_all(store, tags), first)
    assert store.quarantine_counts() == {"bad_number": 1, "bad_time": 1}
    assert store.cursors("csv") == {"inbox/a.csv": {"offset": 100, "sha256": "ab" * 32}}
    assert store.cursors("historian") == {}


def test_overlapping_batch_counts_only_new_readings(store: SqlStore) -> None:
    tags = ["FT-203"]
    store.store_batch(_batch(_readings(10, tags)), source="csv")
    grown = _readings(15, tags)  # the file grew: the first 10 minutes come again
    grown.loc[0, "value"] = -99.0  # a stored reading is kept, not overwritten
    doubled = pd.concat([grown, grown.tail(2)], ignore_index=True)  # repeats in the batch
    assert store.store_batch(_batch(doubled, offset=150), source="csv") == 5
    out = _all(store, tags)
    assert len(out) == 15 and out["value"].iloc[0] == 0.0
    assert store.cursors("csv")["inbox/a.csv"]["offset"] == 150


def test_failure_inside_store_batch_leaves_nothing(
    store: SqlStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    real = store_readings.upsert

    def failing(conn: sa.Connection, table: sa.Table, *args: Any, **kw: Any) -> None:
        if table is tables.cursors_t:  # readings and quarantine are written by now
            raise RuntimeError("disk full (injected)")
        real(conn, table, *args, **kw)

    monkeypatch.setattr(store_readings, "upsert", failing)
    with pytest.raises(RuntimeError, match="injected"):
        store.store_batch(_batch(_readings(30, ["FT-203"])), source="csv")
    monkeypatch.undo()
    assert _all(store, ["FT-203"]).empty
    assert store.quarantine_counts() == {}
    assert store.cursors("csv") == {}
    assert store.store_batch(_batch(_readings(30, ["FT-203"])), source="csv") == 30


def test_read_readings_types_window_and_precision(store: SqlStore) -> None:
    frame = pd.DataFrame(
        {
            "time": pd.to_datetime(
                [
                    "2025-03-01T00:00:00.123456Z",
                    "2025-03-01T01:00:00+01:00",
                    "2025-03-01T00:00:01Z",
                    "2025-03-01T02:00:00Z",
                ],
                utc=True,
                format="ISO8601",
            ),
            "tag": pd.Series(["FT-203", "FT-203", "PT-100", "FT-203"], dtype=object),
            "value": [1.25, np.nan, 3.5e5, 7.0],
            "good": [True, False, True, True],
        }
    )
    store.store_batch(_batch(frame), source="csv")
    out = store.read_readings(["FT-203", "PT-100"], T0, T0 + timedelta(hours=2))
    assert str(out["time"].dtype) == "datetime64[ns, UTC]"
    assert list(out.columns) == ["time", "tag", "value", "good"]
    # 01:00+01:00 is 00:00 UTC; the end of the window is excluded (02:00 is not read).
    assert list(out["tag"]) == ["FT-203", "FT-203", "PT-100"]
    assert out["time"].iloc[1] == pd.Timestamp("2025-03-01T00:00:00.123456Z")  # µs kept
    assert math.isnan(out["value"].iloc[0]) and not out["good"].iloc[0]
    assert out["value"].iloc[2] == 3.5e5
    assert store.read_readings(["FT-999"], T0, T0 + timedelta(hours=2)).empty


def test_read_readings_sorted_by_time_then_tag_across_tags(store: SqlStore) -> None:
    # Tags with different sample counts, shared and own times, one not asked for, and
    # tags that differ only in case (a case-blind collation must not merge or reorder
    # them): the rows of all asked tags, ordered by time and then tag as Python sorts.
    tags = ["PT-100", "FT-203", "ft-203", "TT-100"]
    frame = pd.concat(
        [
            _readings(5, tags[:2]),
            _readings(3, ["ft-203"], start=T0 + timedelta(seconds=30)),
            _readings(4, ["TT-100"]),
            _readings(2, ["LT-303"]),
        ],
        ignore_index=True,
    )
    frame.loc[frame["tag"] == "FT-203", "value"] = np.arange(5) + 0.25
    frame.loc[(frame["tag"] == "PT-100").to_numpy().nonzero()[0][1], "value"] = np.nan
    store.store_batch(_batch(frame), source="csv")
    out = store.read_readings(tags, T0, T0 + timedelta(minutes=3))
    want = frame[frame["tag"].isin(tags) & (frame["time"] < T0 + timedelta(minutes=3))]
    want = (
        want.assign(key=want["tag"].map({t: i for i, t in enumerate(sorted(tags))}))
        .sort_values(["time", "key"])
        .drop(columns="key")
        .reset_index(drop=True)
    )
    assert out["tag"].tolist() == want["tag"].tolist()
    assert out["time"].tolist() == want["time"].tolist()
    np.testing.assert_array_equal(out["value"].to_numpy(), want["value"].to_numpy())
    assert out["tag"].dtype == object and out["good"].dtype == bool
    assert int(out["value"].isna().sum()) == 1


def test_store_pickles_as_the_way_to_reopen_it(store: SqlStore) -> None:
    # worker processes of a backfill open their own connections this way
    store.store_batch(_batch(_readings(3, ["FT-203"])), source="csv")
    again = pickle.loads(pickle.dumps(store))
    try:
        assert isinstance(again, SqlStore) and again is not store
        assert (again.schema, again.dialect) == (store.schema, store.dialect)
        assert len(_all(again, ["FT-203"])) == 3
    finally:
        again.close()
    with pytest.raises(TypeError, match="in-memory"):
        pickle.dumps(SqlStore("sqlite://"))


def test_ctrl_c_in_a_write_lets_the_transaction_end_first(
    store: SqlStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    # SIGINT arrives while the batch's transaction is open: the batch is stored whole,
    # then KeyboardInterrupt is raised, and the store takes the next write at once.
    # Python's own Ctrl-C handler, as in a terminal: a run started in the background
    # (nohup, a service) inherits SIGINT ignored (the autouse fixture restores it after)
    signal.signal(signal.SIGINT, signal.default_int_handler)
    real_upsert = store_readings.upsert

    def interrupted(*args: Any, **kwargs: Any) -> None:
        real_upsert(*args, **kwargs)
        signal.raise_signal(signal.SIGINT)

    monkeypatch.setattr(store_readings, "upsert", interrupted)
    with pytest.raises(KeyboardInterrupt):
        store.store_batch(_batch(_readings(3, ["FT-203"])), source="csv")
    monkeypatch.setattr(store_readings, "upsert", real_upsert)
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler
    assert len(_all(store, ["FT-203"])) == 3
    assert store.store_batch(_batch(_readings(4, ["FT-203"]), "b.csv"), source="csv") == 1


def test_naive_times_are_refused(store: SqlStore) -> None:
    frame = _readings(2, ["FT-203"])
    frame["time"] = frame["time"].dt.tz_localize(None)
    with pytest.raises(ValueError, match="timezone-aware"):
        store.store_batch(_batch(frame), source="csv")
    with pytest.raises(ValueError, match="start must be timezone-aware"):
        store.read_readings(["FT-203"], datetime(2025, 3, 1), T0)


def _fit(r: float, day: int, **extra: Any) -> WindowFit:
    start = T0 + timedelta(days=day)
    row: dict[str, Any] = {
        "branch": "CW-3",
        "window_start": start,
        "window_end": start + timedelta(days=1),
        "r": r,
        "r_low": r - 0.02,
        "r_high": r + 0.02,
        "s_pa": math.nan,
        "identifiable": True,
        "samples": 1200,
        "flow_min_m3s": 0.02,
        "flow_max_m3s": 0.04,
        "status": "ok",
        "message": "",
    }
    row.update(extra)
    return WindowFit(**row)


def test_upsert_fits_replaces_on_branch_and_window(store: SqlStore) -> None:
    assert store.upsert_fits([_fit(1.05, 0), _fit(1.07, 1)]) == 2
    store.upsert_fits([_fit(1.10, 1, message="recomputed")])  # same window again
    fits = store.read_fits("CW-3")
    assert len(fits) == 2
    assert list(fits["r"]) == [1.05, 1.10]
    assert fits["message"].iloc[1] == "recomputed"
    assert math.isnan(fits["s_pa"].iloc[0])  # NaN stored as NULL, read back as NaN
    assert str(fits["window_start"].dtype) == "datetime64[ns, UTC]"
    assert len(store.read_fits(start=T0 + timedelta(days=1))) == 1
    with pytest.raises(TypeError, match="WindowFit, got dict"):
        store.upsert_fits([{"branch": "CW-3", "r": 1.0}])  # type: ignore[list-item]


def test_findings_alarms_maintenance_jobs_health(store: SqlStore) -> None:
    finding = {
        "branch": "CW-3",
        "kind": "fouling",
        "start": T0,
        "detected": T0,
        "end": None,
        "confidence": 0.8,
        "evidence": {"slope_per_day": 0.004, "p": np.float64(0.01), "bad": math.nan},
        "message": "CW-3 is fouling.",
    }
    store.upsert_findings([finding])
    store.upsert_findings([dict(finding, confidence=0.9)])
    found = store.read_findings(open_only=True)
    assert len(found) == 1 and found["confidence"].iloc[0] == 0.9
    assert found["evidence"].iloc[0] == {"slope_per_day": 0.004, "p": 0.01, "bad": None}
    store.upsert_findings([dict(finding, end=T0 + timedelta(days=3))])
    assert store.read_findings(open_only=True).empty

    alarm = {
        "branch": "CW-3",
        "condition": "low_flow",
        "state": "unack",
        "updated": T0,
        "activated": T0,
        "value": 0.01,
        "limit_value": 0.0167,
    }
    store.upsert_alarms([alarm])
    store.upsert_alarms([alarm])  # no state change: no new journal entry
    store.upsert_alarms(
        [
            dict(
                alarm,
                state="ack",
                acknowledged=T0 + timedelta(minutes=5),
                updated=T0 + timedelta(minutes=5),
            )
        ]
    )
    assert list(store.read_alarms(active_only=True)["state"]) == ["ack"]
    events = store.alarm_events("CW-3")
    assert list(zip(events["from_state"], events["to_state"], strict=True)) == [
        (None, "unack"),
        ("unack", "ack"),
    ]
    with pytest.raises(ValueError, match="alarm state"):
        store.upsert_alarms([dict(alarm, state="silenced")])

    store.add_maintenance("CW-3", "cleaned", T0, "hydro-jetted")
    store.add_maintenance("CW-3", "cleaned", T0, "hydro-jetted, both passes")
    log = store.maintenance("CW-3")
    assert len(log) == 1 and log["note"].iloc[0] == "hydro-jetted, both passes"
    with pytest.raises(ValueError, match="kind must be one of"):
        store.add_maintenance("CW-3", "washed", T0)

    store.record_job_run("fit", T0, None, "running")
    store.record_job_run("fit", T0, T0 + timedelta(seconds=40), "ok", {"branches": 12})
    runs = store.job_runs()
    assert len(runs) == 1 and runs["status"].iloc[0] == "ok"
    assert runs["detail"].iloc[0] == {"branches": 12}

    health = pd.DataFrame(
        {
            "tag": ["FT-203", "FT-203"],
            "day": pd.to_datetime(["2025-03-01", "2025-03-02"], utc=True),
            "flag": ["spike", "spike"],
            "count": [3, 1],
        }
    )
    store.add_data_health(health)
    store.add_data_health(health.assign(count=[4, 1]))  # a day recounted replaces
    out = store.data_health(T0, T0 + timedelta(days=1))
    assert out[["tag", "flag", "count"]].values.tolist() == [["FT-203", "spike", 4]]
    assert out["day"].iloc[0] == pd.Timestamp("2025-03-01", tz="UTC")

    store.store_batch(_batch(_readings(5, ["FT-203"])), source="csv")
    assert store.newest_fit_end() is None
    store.upsert_fits([_fit(1.0, 0)])
    assert store.newest_fit_end() == T0 + timedelta(days=1)
    marks = store.watermarks()
    assert marks.readings["last"].iloc[0] == T0 + timedelta(minutes=4)
    assert marks.fits["last_window_end"].iloc[0] == T0 + timedelta(days=1)
    assert list(marks.jobs["status"]) == ["ok"]
    assert list(marks.cursors["key"]) == ["inbox/a.csv"]
    store.upsert_fits([_fit(1.0, 3), _fit(1.0, 1)])
    newest = store.newest_fit_end()
    assert newest == T0 + timedelta(days=4) and newest.tzinfo is not None


def test_bad_arguments_name_themselves(tmp_path: Any) -> None:
    with pytest.raises(ValueError, match="url"):
        SqlStore("not a url")
    with pytest.raises(ValueError, match="schema"):
        SqlStore(f"sqlite:///{tmp_path / 'x.db'}", schema="plant")
    with pytest.raises(ValueError, match="schema must be a plain identifier"):
        SqlStore("postgresql+psycopg://u@127.0.0.1/x", schema="a; drop")
    store = SqlStore(f"sqlite:///{tmp_path / 'y.db'}")
    with pytest.raises(ValueError, match="source"):
        store.store_batch(_batch(_readings(1, ["FT-1"])), source="")
    with pytest.raises(ValueError, match=r"batch.readings lacks columns \['good'\]"):
        store.store_batch(_batch(_readings(1, ["FT-1"]).drop(columns="good")), source="csv")
    with pytest.raises(ValueError, match="confidence"):
        store.upsert_findings(
            [
                {
                    "branch": "b",
                    "kind": "fouling",
                    "start": T0,
                    "detected": T0,
                    "confidence": 1.5,
                    "evidence": {},
                    "message": "m",
                }
            ]
        )
    store.close()


def test_alias_finds_the_store() -> None:
    assert ResultsStore.by_alias("sqlalchemy") is SqlStore
    with pytest.raises(KeyError, match="unknown store kind 'excel'; known: sqlalchemy"):
        ResultsStore.by_alias("excel")


def test_a_concurrent_writer_never_doubles_readings(
    store: SqlStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    tags = ["FT-203"]
    store.store_batch(_batch(_readings(20, tags)), source="csv")
    # Pretend the readings were not there when looked up (another writer stored them
    # between the look-up and the insert): the insert must neither double nor lose any.
    monkeypatch.setattr(store_readings, "raw_rows", lambda conn, query: [])
    try:
        store.store_batch(_batch(_readings(25, tags), offset=300), source="csv")
        monkeypatch.undo()
    except StoreError:  # PostgreSQL's COPY refuses the batch whole; a rerun stores it
        monkeypatch.undo()
        assert store.cursors("csv")["inbox/a.csv"]["offset"] == 100
        assert store.store_batch(_batch(_readings(25, tags), offset=300), source="csv") == 5
    assert len(_all(store, tags)) == 25


def test_screening_counts_round_trip(store: SqlStore) -> None:
    values = np.full(2 * 1440, 0.03)
    values[[5, 2000]] = 0.09  # one spike on each day
    frame = _readings(2 * 1440, ["FT-203"]).assign(value=values)
    counts = screen(frame, {"FT-203": TagLimits(kind="flow")}).health_counts()
    store.add_data_health(counts)
    back = store.data_health(T0, T0 + timedelta(days=2))
    expected = counts.sort_values(["day", "tag", "flag"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(back, expected)
    assert list(back.loc[back["flag"] == "spike", "count"]) == [1, 1]


def test_an_old_schema_is_upgraded_in_place(
    store_opener: Callable[..., SqlStore],
) -> None:
    from alembic import command
    from alembic.config import Config

    old = store_opener(migrate=False)
    cfg = Config()
    cfg.set_main_option("script_location", str(store_module._MIGRATIONS))
    with old.engine.begin() as conn:  # a database left at the first schema version
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "0001_initial")
    old.store_batch(_batch(_readings(4, ["FT-203"])), source="csv")
    old_fits = sa.Table(  # the columns every version of the fits table has
        "fits", sa.MetaData(), sa.Column("branch", sa.String(100)),
        *(sa.Column(c, tables.UTCDateTime()) for c in ("window_start", "window_end",
                                                       "computed_at")),
        sa.Column("r", sa.Double()), sa.Column("samples", sa.Integer()),
        sa.Column("status", sa.String(40)),
    )  # fmt: skip
    with old.engine.begin() as conn:
        conn.execute(old_fits.insert(), [{
            "branch": "CW-3", "window_start": T0, "window_end": T0 + timedelta(days=1),
            "computed_at": T0, "r": 1.1, "samples": 1200, "status": "ok",
        }])  # fmt: skip
    new = store_opener()  # opening migrates to the newest version, keeping every row
    assert len(_all(new, ["FT-203"])) == 4
    fits = new.read_fits()
    assert list(fits["r"]) == [1.1] and math.isnan(fits["sum_w"].iloc[0])
    assert new.cursors("csv")["inbox/a.csv"]["offset"] == 100


def test_tags_differing_only_in_case_are_two_tags(store: SqlStore) -> None:
    # ISA-5.1 tags are upper case by habit, but a historian may export both spellings:
    # on every backend they are two series (MariaDB's default collation would make the
    # second a duplicate of the first and drop it; migration 0005 makes tags binary).
    frame = pd.concat([_readings(4, ["FT-203"]), _readings(4, ["ft-203"])], ignore_index=True)
    frame.loc[frame["tag"] == "ft-203", "value"] = -1.0
    assert store.store_batch(_batch(frame), source="csv") == 8
    out = _all(store, ["FT-203", "ft-203"])
    assert sorted(out.groupby("tag").size().items()) == [("FT-203", 4), ("ft-203", 4)]
    assert (out.loc[out["tag"] == "ft-203", "value"] == -1.0).all()
