"""Secrets stay secret: masking, private files, and one login attempt per wrong password.

References: URL userinfo syntax ``user:password@host`` is RFC 3986 §3.2.1; SQLSTATE class
28 "invalid authorization specification" is ISO/IEC 9075 (SQL), used by PostgreSQL
(28000, 28P01 — PostgreSQL manual, Appendix A "Error Codes") and MariaDB/MySQL; MySQL
error 1045 ER_ACCESS_DENIED_ERROR is in the MySQL server error reference. File mode bits
(0o004 "others may read") are POSIX ``<sys/stat.h>``. That SQLite creates a database's
-wal and -shm files with the database file's permissions is from the SQLite source
(``os_unix.c``, ``findCreateFileMode``), from memory.
"""

from __future__ import annotations

import json
import logging
import os
import sqlite3
import stat
import time
import tomllib
import urllib.parse
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa
import tomli_w

from adapters import credentials
from adapters.base import StoreError, open_store
from adapters.credentials import (
    is_authentication_failure,
    mask_secrets,
    remember_secret,
)
from adapters.records import TagSpec
from adapters.sql_source import CredentialsRefused, SqlSource
from adapters.store import SqlStore
from monitor.app.cli import FILE_UMASK, main
from tests.monitor.test_user_errors import one_line_error, write_site

TAGS = [TagSpec("PT-100", "bar", "pressure")]
T0 = datetime(2026, 6, 1, tzinfo=UTC)


@pytest.fixture(autouse=True)
def _forget_secrets(monkeypatch: pytest.MonkeyPatch) -> None:
    """The passwords these tests make up are not masked in later tests' messages."""
    monkeypatch.setattr(credentials, "_known", set(credentials._known))


# ------------------------------------------------------------------------- masking


@pytest.mark.parametrize(
    ("text", "secret"),
    [
        ("postgresql+psycopg://reader:Tr1cky-pw@db:5432/plant", "Tr1cky-pw"),  # RFC 3986 userinfo
        ("mysql+pymysql://root@db/plant?charset=utf8mb4&password=q1w2e3r4", "q1w2e3r4"),
        ("postgresql://u@db/plant?PASSWORD=Upper-case-1", "Upper-case-1"),  # case-blind
        ("postgresql://u@db/plant?sslmode=require&Passwd=pw-passwd-9", "pw-passwd-9"),
        ("mssql://u@db/plant?pwd=zq9;x=1", "zq9"),  # short: caught by the key pattern
        ("host=db user=reader password=libpq-style-7 dbname=plant", "libpq-style-7"),
        ('{"url_env": "X", "password": "in-json-8"}', "in-json-8"),
        ("error: password = 'quoted value 5' refused", "quoted value 5"),
    ],
)
def test_mask_removes_the_password(text: str, secret: str) -> None:
    masked = mask_secrets(text)
    assert secret not in masked
    assert "***" in masked


def test_mask_keeps_what_is_not_secret() -> None:
    text = "postgresql://reader@db:5432/plant?sslmode=require (using password: YES)"
    # no userinfo password, no key=value password: unchanged (MySQL's own wording kept)
    assert mask_secrets(text) == text
    assert mask_secrets("sqlite:////var/lib/bw/branchwatch.db") == "sqlite:////var/lib/bw/branchwatch.db"


def test_remembered_password_is_masked_bare_and_quoted() -> None:
    remember_secret("p@ss w0rd/ZZ")
    text = ("driver said: login p@ss w0rd/ZZ failed "
            "(url-quoted: p%40ss%20w0rd%2FZZ, p%40ss+w0rd%2FZZ)")
    masked = mask_secrets(text)
    assert "w0rd" not in masked
    assert masked.count("***") == 3


def test_a_remembered_password_inside_a_longer_word_is_left() -> None:
    remember_secret("postgres")
    masked = mask_secrets("login postgres refused by postgresql://db/plant")
    assert masked == "login *** refused by postgresql://db/plant"


def test_a_short_password_does_not_mask_ordinary_letters() -> None:
    remember_secret("ab")  # below MIN_BARE_SECRET: patterns only
    assert mask_secrets("table 'abc' does not exist") == "table 'abc' does not exist"
    assert "ab@" not in mask_secrets("postgresql://u:ab@db/x")


def test_authentication_failures_are_told_from_lost_servers() -> None:
    class DriverError(Exception):
        def __init__(self, *args: Any, sqlstate: str | None = None) -> None:
            super().__init__(*args)
            self.sqlstate = sqlstate

    # PostgreSQL manual, Appendix A: 28P01 invalid_password
    assert is_authentication_failure(DriverError("FATAL", sqlstate="28P01"))
    # MySQL error reference: 1045 ER_ACCESS_DENIED_ERROR
    assert is_authentication_failure(DriverError(1045, "Access denied for user 'r'@'h'"))
    # PostgreSQL's server message for a wrong password (from memory)
    assert is_authentication_failure(
        DriverError('FATAL:  password authentication failed for user "reader"'))
    # a server that is down is not a refused login: 08001 connection failure (SQL standard)
    assert not is_authentication_failure(DriverError("connection refused", sqlstate="08001"))
    assert not is_authentication_failure(DriverError(2003, "Can't connect to MySQL server"))


def test_a_config_url_with_a_query_password_is_refused() -> None:
    with pytest.raises(ValueError, match="url_env"):
        SqlSource(TAGS, url="postgresql+psycopg://u@db/x?password=Hidden-99", table="t")


# ------------------------------------------------------------------------- job runs


def test_job_run_records_are_masked(tmp_path: Path) -> None:
    store = SqlStore(f"sqlite:///{tmp_path / 's.db'}")
    url = "postgresql://reader:Rec0rd-pw@db/plant?password=Rec0rd-q"
    store.record_job_run("ingest", T0, T0, "failed",
                         {"error": f"OperationalError: {url}", "tries": [url]})
    raw = sqlite3.connect(tmp_path / "s.db").execute("SELECT detail FROM job_runs").fetchall()
    assert raw and "Rec0rd" not in str(raw)
    assert json.loads(raw[0][0])["error"].startswith("OperationalError: postgresql://reader:***@")
    # a row written before masking existed is masked when read
    with store.engine.begin() as conn:
        conn.exec_driver_sql(
            "UPDATE job_runs SET detail = ?", (json.dumps({"error": url}),))
    assert "Rec0rd" not in str(store.job_runs().to_dict(orient="records"))
    store.close()


def test_store_errors_are_masked(tmp_path: Path) -> None:
    store = SqlStore(f"sqlite:///{tmp_path / 's.db'}")
    driver_text = "could not connect: postgresql://reader:Err-pw-77@db/plant"
    error = store._error("results store read failed",
                         sa.exc.OperationalError("SELECT 1", {}, Exception(driver_text)))
    assert "Err-pw-77" not in str(error) and "reader:***@db" in str(error)
    store.close()


# ------------------------------------------------------------------------- file modes


@pytest.fixture
def open_umask() -> Iterator[None]:
    """The usual login umask 0o022 (files readable by everyone) during the test."""
    old = os.umask(0o022)
    try:
        yield
    finally:
        os.umask(old)


def _others_can_access(path: Path) -> bool:
    return bool(stat.S_IMODE(path.stat().st_mode) & 0o007)


def test_store_file_is_created_private(tmp_path: Path, open_umask: None) -> None:
    db = tmp_path / "var" / "bw.db"
    store = SqlStore(f"sqlite:///{db}")
    store.record_job_run("ingest", T0, None, "running")  # a write: -wal and -shm exist now
    for part in (db, db.with_name("bw.db-wal"), db.with_name("bw.db-shm")):
        if part.exists():
            assert stat.S_IMODE(part.stat().st_mode) == 0o640, part
    assert db.with_name("bw.db-wal").exists()
    store.close()


def test_an_existing_world_readable_store_is_tightened(tmp_path: Path, open_umask: None) -> None:
    db = tmp_path / "bw.db"
    SqlStore(f"sqlite:///{db}").close()
    db.chmod(0o644)
    SqlStore(f"sqlite:///{db}").close()
    assert stat.S_IMODE(db.stat().st_mode) == 0o640


def test_cli_writes_files_for_user_and_group_only(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], open_umask: None,
) -> None:
    site = write_site(tmp_path)
    steps = [
        ["report", site],
        ["analyze", site, "--from", "2026-05-01", "--to", "2026-05-02", "--quiet",
         "--findings", tmp_path / "out" / "findings.json", "--fits", tmp_path / "fits.csv"],
        ["run", site, "--for", "1"],
    ]
    for argv in steps:
        assert main([str(a) for a in argv]) == 0, capsys.readouterr().err
    assert os.umask(0o022) == 0o022  # main restored the caller's umask
    created = [tmp_path / "var" / "branchwatch.db", tmp_path / "out" / "findings.json",
               tmp_path / "out", tmp_path / "fits.csv", tmp_path / "reports",
               tmp_path / "reports" / "branchwatch-health.json",
               *(tmp_path / "reports").glob("morning-*.html")]
    assert len(created) == 7, created  # one morning report
    for path in created:
        assert not _others_can_access(path), f"{path}: {stat.S_IMODE(path.stat().st_mode):04o}"
    assert FILE_UMASK & 0o007 == 0o007


# ------------------------------------------------------------------------- refused logins


def _with_login(base: str, user: str, password: str) -> str:
    return sa.make_url(base).set(username=user, password=password).render_as_string(
        hide_password=False)


@pytest.fixture
def connects(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Every DBAPI connection attempt SQLAlchemy makes, by dialect name."""
    seen: list[str] = []
    real = sa.engine.default.DefaultDialect.connect

    def counting(self: Any, *args: Any, **kwargs: Any) -> Any:
        seen.append(self.name)
        return real(self, *args, **kwargs)

    monkeypatch.setattr(sa.engine.default.DefaultDialect, "connect", counting)
    return seen


@pytest.mark.server
@pytest.mark.parametrize("server", ["postgresql", "mysql"])
def test_source_stops_at_the_first_refused_login(
    request: pytest.FixtureRequest, server: str, connects: list[str],
    monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture,
) -> None:
    base = request.getfixturevalue("postgres_url" if server == "postgresql" else "mariadb_url")
    connects.clear()  # the fixture's own reachability check is not ours
    url = _with_login(base, "bw_no_such_role" if server == "postgresql" else "root",
                      "Wr0ng-Login-pw")
    monkeypatch.setenv("BW_TEST_LOGIN", url)
    source = SqlSource(TAGS, url_env="BW_TEST_LOGIN", table="readings", max_tries=5,
                       backoff_seconds=2.0)
    caplog.set_level(logging.DEBUG)
    started = time.monotonic()
    with pytest.raises(CredentialsRefused) as info:
        list(source.batches({}))
    elapsed = time.monotonic() - started
    source.close()
    assert connects == [server]  # exactly one attempt
    assert elapsed < 2.0  # no backoff sleep before giving up
    message = str(info.value)
    assert "refused the login" in message and "not retried" in message
    assert len(message.splitlines()) == 1
    assert "Wr0ng-Login-pw" not in message + caplog.text
    assert "next try" not in caplog.text


@pytest.mark.server
@pytest.mark.parametrize("server", ["postgresql", "mysql"])
def test_store_stops_at_the_first_refused_login(
    request: pytest.FixtureRequest, server: str, connects: list[str]
) -> None:
    base = request.getfixturevalue("postgres_url" if server == "postgresql" else "mariadb_url")
    connects.clear()  # the fixture's own reachability check is not ours
    url = _with_login(base, "bw_no_such_role" if server == "postgresql" else "root",
                      "Wr0ng-Store-pw")
    with pytest.raises(StoreError) as info:
        open_store(url)
    assert connects == [server]
    message = str(info.value)
    assert "refused the login" in message and len(message.splitlines()) == 1
    assert "Wr0ng-Store-pw" not in message


# ------------------------------------------------------------------------- no leaks


def _forms(secret: str) -> list[str]:
    return [secret, urllib.parse.quote_plus(secret), urllib.parse.quote(secret, safe="")]


@pytest.mark.server
def test_passwords_appear_in_no_output_log_or_record(
    tmp_path: Path, postgres_url: str, mariadb_url: str, capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture,
) -> None:
    """Provoke the error paths with passwords in URLs; none reaches stdout, stderr, a
    log record or the job_runs table."""
    caplog.set_level(logging.DEBUG)
    store_db = tmp_path / "var" / "store.db"
    monkeypatch.setenv("BW_LEAK_STORE", f"sqlite:///{store_db}")
    secrets = {
        "query": "Leak-query-pw/1",
        "userinfo": "Leak-userinfo-pw@2",
        "maria": "Leak-maria-pw 3",
    }

    def site_with(source_url: str) -> Path:
        monkeypatch.setenv("BW_LEAK_SOURCE", source_url)
        doc = tomllib.loads(write_site(tmp_path).read_text())
        doc["store"] = {"url_env": "BW_LEAK_STORE"}
        doc["source"] = {"kind": "sql", "table": "no_such_table", "url_env": "BW_LEAK_SOURCE"}
        path = tmp_path / "site.toml"
        path.write_text(tomli_w.dumps(doc))
        return path

    pg = sa.make_url(postgres_url)
    # 1. a password in the URL's query, a table name typo (PostgreSQL accepts the login)
    site = site_with(pg.update_query_dict({"password": secrets["query"]}).render_as_string(
        hide_password=False))
    for verb in ("ingest", "check"):
        code = main([verb, str(site)])
        out, err = capsys.readouterr()
        assert code == 2 and "no_such_table" in out + err
        assert all(f not in out + err for f in _forms(secrets["query"]))
    # 2. a refused login with the password in the userinfo
    site = site_with(_with_login(postgres_url, "bw_no_such_role", secrets["userinfo"]))
    code = main(["ingest", str(site)])
    one_line_error(code, capsys.readouterr().err, "refused the login")
    # 3. the store itself refuses the login (MariaDB, wrong password)
    monkeypatch.setenv("BW_LEAK_MARIA", _with_login(mariadb_url, "root", secrets["maria"]))
    doc = tomllib.loads(site.read_text())
    doc["store"] = {"url_env": "BW_LEAK_MARIA"}
    maria_site = tmp_path / "maria-site.toml"
    maria_site.write_text(tomli_w.dumps(doc))
    code = main(["status", str(maria_site)])
    one_line_error(code, capsys.readouterr().err, "refused the login")
    # what the job log says, through the CLI and in the table itself
    code = main(["status", str(site), "--json"])
    out, err = capsys.readouterr()
    assert code == 0
    runs = json.loads(out)["jobs"]
    assert [r["status"] for r in runs].count("failed") == 2
    with sqlite3.connect(store_db) as conn:
        table = str(conn.execute("SELECT * FROM job_runs").fetchall())
    assert "no_such_table" in table and "refused the login" in table
    # the morning report and the health file written after those failures
    assert main(["report", str(site)]) == 0
    out2, err2 = capsys.readouterr()
    written = [p for p in (tmp_path / "reports").rglob("*") if p.is_file()]
    assert any(p.suffix == ".html" for p in written), written
    files = "".join(p.read_text(encoding="utf-8", errors="replace") for p in written)
    seen = out + err + out2 + err2 + files + table + caplog.text \
        + "".join(r.getMessage() for r in caplog.records)
    for secret in secrets.values():
        for form in _forms(secret):
            assert form not in seen, form
