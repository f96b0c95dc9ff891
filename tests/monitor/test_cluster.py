"""`analyze --executor dask`: a backfill on a Dask distributed cluster stores the same fits
and findings as the one-process path, value for value; survives a killed worker; and
says clearly when no scheduler answers or the store is a SQLite file.

Invented data: the example site simulated for 22 days at 10-minute steps across the
end of March 2026 (two local months, and the spring DST change of Europe/Berlin), with a
valve left throttled on B2-compressor on the 18th day, ingested from CSV exports into
a private PostgreSQL schema per run. The cluster: `distributed.LocalCluster` with two
single-threaded worker processes.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import uuid
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
import sqlalchemy as sa

from adapters.fit_record import WindowFit
from adapters.store import SqlStore
from model.simulate import StepRestriction
from monitor.analysis.window import analyze_window
from monitor.app.cli import main
from monitor.app.cluster import (
    SchedulerUnreachable,
    SiteRun,
    StoreNotShared,
    analyze_on_cluster,
    branch_groups,
    connect,
    group_tags,
    month_tasks,
)
from monitor.app.demo import EXAMPLE_SITE, simulate_site, write_exports
from monitor.app.ingest import ingest, open_source
from monitor.app.jobs import analyze
from monitor.app.windows import windows
from monitor.site.config import Site, load_site
from tests.adapters.test_fit_record import fits_frame

distributed = pytest.importorskip("distributed")

START = datetime(2026, 3, 12, 23, tzinfo=UTC)  # local midnight, Europe/Berlin (CET)
END = START + timedelta(days=22)
#: after the diagnosis's baseline of 14 windows (`DiagnosisSettings.baseline_windows`)
STEP_AT = START + timedelta(days=17, hours=9.5)


@pytest.fixture(scope="module")
def site_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("fleet-site")
    path = folder / "site.toml"
    shutil.copyfile(EXAMPLE_SITE, path)
    site = load_site(path)
    sim = simulate_site(site, START, END, step_s=600.0, seed=11,
                        faults=[StepRestriction("B2-compressor", STEP_AT, ratio=1.5)])
    write_exports(site, sim, folder / "inbox")
    settled = datetime.now(UTC).timestamp() - 3600  # exports dropped long ago
    for p in (folder / "inbox").iterdir():
        os.utime(p, (settled, settled))
    return path


@pytest.fixture(scope="module")
def schemas(postgres_url: str) -> Iterator[list[str]]:
    """Names of the schemas made by this module's stores, dropped at its end."""
    made: list[str] = []
    yield made
    engine = sa.create_engine(postgres_url)
    with engine.begin() as conn:
        for name in made:
            conn.exec_driver_sql(f'DROP SCHEMA IF EXISTS "{name}" CASCADE')
    engine.dispose()


def _store(postgres_url: str, schemas: list[str], site: Site) -> SqlStore:
    """A fresh PostgreSQL store with the site's exports ingested."""
    name = "bw_fleet_" + uuid.uuid4().hex[:10]
    schemas.append(name)
    store = SqlStore(postgres_url, schema=name)
    ingest(site, store, open_source(site))
    return store


def _fits(store: SqlStore) -> pd.DataFrame:
    return (store.read_fits().drop(columns="computed_at")
            .sort_values(["branch", "window_start"]).reset_index(drop=True))


def _findings(store: SqlStore) -> pd.DataFrame:
    frame = store.read_findings()
    return frame.drop(columns=[c for c in ("id", "updated") if c in frame.columns]
                      ).sort_values(["branch", "kind", "start"]).reset_index(drop=True)


def _screening(store: SqlStore) -> pd.DataFrame:
    return (store.read_screening().sort_values(["window_start", "branch", "tag"])
            .reset_index(drop=True))


@pytest.fixture(scope="module")
def serial(site_file: Path, postgres_url: str, schemas: list[str]) -> dict[str, Any]:
    """The one-process results (``--executor local --jobs 1``)."""
    site = load_site(site_file)
    store = _store(postgres_url, schemas, site)
    assert store.shared
    summary = analyze(site, store, open_source(site), START, END, jobs=1)
    out = {"summary": summary, "fits": _fits(store), "findings": _findings(store),
           "screening": _screening(store), "balance": store.read_balance()}
    store.close()
    return out


@pytest.fixture(scope="module")
def cluster() -> Iterator[Any]:
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as c:
        yield c


def _same_as_serial(store: SqlStore, serial: dict[str, Any]) -> None:
    pd.testing.assert_frame_equal(_fits(store), serial["fits"])
    pd.testing.assert_frame_equal(_findings(store), serial["findings"])
    pd.testing.assert_frame_equal(_screening(store), serial["screening"])
    pd.testing.assert_frame_equal(store.read_balance(), serial["balance"])


@pytest.mark.server
@pytest.mark.parametrize("group_size", [None, 2])
def test_the_cluster_stores_what_the_serial_path_stores(
    site_file: Path, postgres_url: str, schemas: list[str], serial: dict[str, Any],
    cluster: Any, group_size: int | None,
) -> None:
    site = load_site(site_file)
    store = _store(postgres_url, schemas, site)
    done: list[tuple[int, int]] = []
    with distributed.Client(cluster) as client:
        [summary] = analyze_on_cluster(
            client, [SiteRun(site, store, open_source(site))], START, END,
            group_size=group_size, progress=lambda i, n: done.append((i, n)))
    tasks = len(month_tasks(site, 0, START, END, group_size=group_size)) + 1  # + diagnosis
    assert done == [(i, tasks) for i in range(1, tasks + 1)]
    one = serial["summary"]
    assert (summary.windows, summary.fits, summary.fits_ok) == (
        one.windows, one.fits, one.fits_ok)
    # readings read: each group reads the header's tags again
    assert summary.readings == one.readings if group_size is None else (
        summary.readings > one.readings)
    assert [f.to_json_dict() for f in summary.findings] == [
        f.to_json_dict() for f in one.findings]
    # the throttled valve is found, so the findings compared are not an empty list
    assert any(f.branch == "B2-compressor" and f.kind == "restriction" for f in one.findings)
    _same_as_serial(store, serial)
    store.close()


@pytest.mark.server
def test_a_killed_worker_loses_and_doubles_nothing(
    site_file: Path, postgres_url: str, schemas: list[str], serial: dict[str, Any],
    cluster: Any,
) -> None:
    site = load_site(site_file)
    store = _store(postgres_url, schemas, site)
    killed: list[int] = []
    with distributed.Client(cluster) as client:
        client.wait_for_workers(2)
        pids = client.run(os.getpid)

        def kill_a_busy_worker(done: int, total: int) -> None:
            if killed:
                return
            busy = [w for w, keys in client.processing().items() if keys]
            if busy:  # SIGKILL: no clean-up; the nanny starts a new worker process
                killed.append(pids[busy[0]])
                os.kill(pids[busy[0]], signal.SIGKILL)

        # three groups of two branches: six tasks, so tasks are in hand when one ends
        analyze_on_cluster(client, [SiteRun(site, store, open_source(site))], START, END,
                           group_size=2, progress=kill_a_busy_worker)
    assert len(killed) == 1
    fits = _fits(store)
    assert not fits.duplicated(["branch", "window_start"]).any()
    assert len(fits) == len(serial["fits"])
    _same_as_serial(store, serial)
    store.close()


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.mark.server
def test_no_scheduler_is_a_clear_error_and_a_rerun_completes(
    site_file: Path, postgres_url: str, schemas: list[str], serial: dict[str, Any],
    cluster: Any,
) -> None:
    address = f"tcp://127.0.0.1:{_free_port()}"
    with pytest.raises(SchedulerUnreachable, match=f"no Dask scheduler answers at '{address}'"
                       r".*dask scheduler.*dask worker .*nothing was analysed"), \
            connect(address, timeout_s=2.0):
        pass  # pragma: no cover
    site = load_site(site_file)
    store = _store(postgres_url, schemas, site)
    assert store.read_fits().empty
    with connect(cluster.scheduler_address) as client:
        analyze_on_cluster(client, [SiteRun(site, store, open_source(site))], START, END)
    _same_as_serial(store, serial)
    store.close()


def test_a_sqlite_store_is_refused_with_what_to_use(site_file: Path, tmp_path: Path) -> None:
    site = load_site(site_file)
    store = SqlStore(f"sqlite:///{tmp_path / 'store.db'}")
    assert not store.shared
    with pytest.raises(StoreNotShared, match="SQLite file, which workers on other machines "
                       "cannot share; use a PostgreSQL store"):
        analyze_on_cluster(None, [SiteRun(site, store, open_source(site))], START, END)
    store.close()


def test_cli_refuses_sqlite_before_starting_a_cluster(
    site_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    span = ["--from", START.isoformat(), "--to", END.isoformat()]
    assert main(["analyze", str(site_file), *span, "--executor", "dask", "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot share; use a PostgreSQL store" in err[0]
    assert main(["analyze", str(site_file), *span, "--scheduler", "tcp://x:8786"]) == 2
    assert "--scheduler and --group-size need --executor dask" in capsys.readouterr().err


def test_tasks_are_months_of_branch_groups(site_file: Path) -> None:
    site = load_site(site_file)
    names = [b.name for b in site.branches]
    assert branch_groups(site) == [tuple(names)]
    groups = branch_groups(site, 4)
    assert [len(g) for g in groups] == [4, 2] and sorted(sum(groups, ())) == sorted(names)
    tasks = month_tasks(site, 0, START, END, group_size=4)
    # March's windows (13th .. 31st, local days) and April's, each for both groups
    assert [(t.month, len(t.spans), t.header) for t in tasks] == [
        ("2026-03", 19, True), ("2026-03", 19, False), ("2026-04", 3, True),
        ("2026-04", 3, False)]
    spans = [s for t in tasks if t.header for s in t.spans]
    assert spans == list(windows(START, END, site.window, site.timezone))
    # a group reads the header's tags and its own branches' only
    other = [b for b in site.branches if b.name not in groups[1]]
    tags = set(group_tags(site, groups[1], header=False))
    assert site.header_pressure_tag in tags
    assert not tags & {b.flow_tag for b in other}
    with pytest.raises(ValueError, match="group size must be 1 or more"):
        branch_groups(site, 0)


def test_a_group_of_branches_gives_the_whole_sites_rows_for_them(
    site_file: Path, tmp_path: Path
) -> None:
    site = load_site(site_file)
    store = SqlStore(f"sqlite:///{tmp_path / 'store.db'}")
    ingest(site, store, open_source(site))
    ws, we = list(windows(START, END, site.window, site.timezone))[18]  # the step's day
    whole = analyze_window(site, store.read_readings(list(site.tags), ws, we), ws, we)
    got: dict[str, WindowFit] = {}
    screening, health = [], []
    balance = None
    for i, group in enumerate(branch_groups(site, 4)):
        tags = group_tags(site, group, header=i == 0)
        part = analyze_window(site, store.read_readings(tags, ws, we), ws, we,
                              branches=group, header=i == 0)
        if i == 0:
            balance = part.balance
        else:
            assert part.balance is None
        got.update({f.branch: f for f in part.fits})
        screening.append(part.screening)
        health.append(part.health)
    store.close()
    assert whole.balance is not None and balance == whole.balance
    pd.testing.assert_frame_equal(
        fits_frame(got[f.branch] for f in whole.fits), fits_frame(whole.fits))
    key = ["branch", "tag"]
    pd.testing.assert_frame_equal(
        pd.concat(screening).sort_values(key).reset_index(drop=True),
        whole.screening.sort_values(key).reset_index(drop=True), check_dtype=False)
    pd.testing.assert_frame_equal(
        pd.concat(health).sort_values(["tag", "day", "flag"]).reset_index(drop=True),
        whole.health.sort_values(["tag", "day", "flag"]).reset_index(drop=True))
