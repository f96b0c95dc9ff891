"""Shared fixtures: database URLs of the loopback servers, required in CI.

PostgreSQL and MariaDB tests use the URLs in ``BRANCHWATCH_TEST_POSTGRES_URL`` and
``BRANCHWATCH_TEST_MARIADB_URL`` (defaults: the servers this project's machines run on
loopback). Where a server cannot be reached the test skips with the reason — unless
``BRANCHWATCH_REQUIRE_SERVERS=1`` (set by ``.ci/run``), where it fails instead.
"""

from __future__ import annotations

import os
import signal
import uuid
from collections.abc import Iterator

import pytest

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
