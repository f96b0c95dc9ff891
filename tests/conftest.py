"""Shared fixtures: database URLs of the loopback servers, required in CI.

PostgreSQL and MariaDB tests use the URLs in ``BRANCHWATCH_TEST_POSTGRES_URL`` and
``BRANCHWATCH_TEST_MARIADB_URL`` (defaults: the servers this project's machines run on
loopback). Where a server cannot be reached the test skips with the reason — unless
``BRANCHWATCH_REQUIRE_SERVERS=1`` (set by ``.ci/run``), where it fails instead.

`store_opener` and `store` give a test a results store of its own, once on each of
SQLite, PostgreSQL and MariaDB; `schema_pair` two PostgreSQL schema names of its own.
"""

from __future__ import annotations

import os
import signal
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import pytest

from tests.servers import drop_schemas

if TYPE_CHECKING:
    from adapters.store import SqlStore

POSTGRES_URL = os.environ.get(
    "BRANCHWATCH_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)
MARIADB_URL = os.environ.get(
    "BRANCHWATCH_TEST_MARIADB_URL", "mysql+pymysql://root@127.0.0.1:3306/test"
)
REQUIRE_SERVERS = os.environ.get("BRANCHWATCH_REQUIRE_SERVERS") == "1"


def _server_url(url: str, what: str) -> str:
    import sqlalchemy as sa

    try:
        engine = sa.create_engine(url, pool_pre_ping=True)
        with engine.connect() as conn:
            conn.execute(sa.text("SELECT 1"))
        engine.dispose()
    except Exception as exc:  # any driver error means "not reachable"
        message = f"{what} not reachable at {url.split('@')[-1]}: {type(exc).__name__}: {exc}"
        if REQUIRE_SERVERS:
            pytest.fail(message + " (BRANCHWATCH_REQUIRE_SERVERS=1: CI requires it)")
        pytest.skip(message)
    return url


@pytest.fixture(scope="session")
def postgres_url() -> str:
    """URL of the loopback PostgreSQL test database (skips or fails when absent)."""
    return _server_url(POSTGRES_URL, "PostgreSQL")


@pytest.fixture(scope="session")
def mariadb_url() -> str:
    """URL of the loopback MariaDB test database (skips or fails when absent)."""
    return _server_url(MARIADB_URL, "MariaDB")


@pytest.fixture
def unique_name() -> Iterator[str]:
    """A table-name-safe unique suffix, so parallel or repeated runs do not collide."""
    yield "bw_" + uuid.uuid4().hex[:10]


@pytest.fixture(
    params=[
        "sqlite",
        pytest.param("postgresql", marks=pytest.mark.server),
        pytest.param("mariadb", marks=pytest.mark.server),
    ]
)
def store_opener(
    request: pytest.FixtureRequest, tmp_path: Path, unique_name: str
) -> Iterator[Callable[..., SqlStore]]:
    """Opens (another) results store on this test's own database — a SQLite file, or a
    schema (PostgreSQL) or database (MariaDB) named `unique_name` — with
    ``migrate`` (default True) passed on; every store opened is closed and the schema or
    database dropped afterwards. Each test that uses it runs once per dialect."""
    from adapters.store import SqlStore

    opened: list[SqlStore] = []
    if request.param == "sqlite":
        url, schema = f"sqlite:///{tmp_path / 'branchwatch.db'}", None
    else:
        fixture = "postgres_url" if request.param == "postgresql" else "mariadb_url"
        url, schema = request.getfixturevalue(fixture), unique_name

    def open_store(migrate: bool = True) -> SqlStore:
        opened.append(SqlStore(url, schema=schema, migrate=migrate))
        return opened[-1]

    yield open_store
    for s in opened:
        s.close()
    if schema is not None:
        drop_schemas(url, [schema])


@pytest.fixture
def store(store_opener: Callable[..., SqlStore]) -> SqlStore:
    """A migrated results store on this test's own database (see `store_opener`)."""
    return store_opener()


@pytest.fixture
def schema_pair(postgres_url: str, unique_name: str) -> Iterator[list[str]]:
    """Two schema names of this test's own on the PostgreSQL server (``<unique_name>_a``
    and ``_b``), dropped with what they hold afterwards."""
    names = [f"{unique_name}_a", f"{unique_name}_b"]
    try:
        yield names
    finally:
        drop_schemas(postgres_url, names)


@pytest.fixture(autouse=True)
def _signal_handlers_restored() -> Iterator[None]:
    """The daemon installs its SIGINT/SIGTERM handlers for good (a CLI process ends after
    it); every test gets the handlers it started with back, so a daemon test cannot change
    how a later test sees Ctrl-C."""
    saved = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for sig, handler in saved.items():
            signal.signal(sig, handler)
