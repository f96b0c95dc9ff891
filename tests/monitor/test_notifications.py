"""The outbox: alarms and the digest reach a real SMTP server and webhook exactly once.

Servers are real and on loopback (tests/servers.py: aiosmtpd, http.server). The site is
the demo site (invented data, tests/monitor/small_site.py) with a [notify] section added.
Exactly-once is checked across a SIGKILL between queueing and sending: the message is in
the store's outbox, the restarted daemon sends it, and the servers get one copy each.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from adapters.base import open_store
from monitor.app.cli import main
from monitor.app.morning_report import write_report
from monitor.app.notifications import (
    alarm_priority,
    build_notifiers,
    deliver,
    queue_alarms,
    queue_digest,
    queue_test,
)
from monitor.site.config import load_site
from tests.monitor.small_site import copy_site, ingested_site
from tests.servers import HookServer, MailServer, free_port

ROOT = Path(__file__).resolve().parents[2]
NOW = datetime(2026, 4, 3, 8, 0, tzinfo=UTC)  # just after the demo site's two days


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return ingested_site(tmp_path_factory.mktemp("notify"))


def _with_notify(site_file: Path, smtp_port: int, hook_url: str, extra: str = "") -> None:
    text = site_file.read_text()
    text = text.replace("[[branch]]", textwrap.dedent(f"""\
        [notify]
        send_at_once = "medium"
        {extra}
        [notify.email]
        host = "127.0.0.1"
        port = {smtp_port}
        security = "none"
        sender = "branchwatch@plant.example"
        to = ["cw-desk@plant.example"]
        timeout = "2 s"

        [notify.webhook]
        url = "{hook_url}"
        timeout = "2 s"

        [[branch]]"""), 1)
    site_file.write_text(text)


@pytest.fixture
def servers() -> Iterator[tuple[MailServer, HookServer]]:
    with MailServer() as mail, HookServer() as hook:
        yield mail, hook


def _activate(store: object, when: datetime, branch: str = "B2-compressor",
              condition: str = "low_flow") -> None:
    store.upsert_alarms([{  # type: ignore[attr-defined]
        "branch": branch, "condition": condition, "state": "unack", "priority": "high",
        "activated": when, "value": 0.011, "limit_value": 0.0139, "updated": when,
        "message": f"Low flow on {branch}: 40.0 m3/h, below its minimum 50.0 m3/h.",
        "active": True,
    }])


def test_priorities() -> None:
    assert alarm_priority("low_flow") == "high"
    assert alarm_priority("stale source") == "high"
    assert alarm_priority("frozen FT-310") == "medium"


def test_an_alarm_reaches_both_channels_once(
    built: Path, tmp_path: Path, servers: tuple[MailServer, HookServer]
) -> None:
    mail, hook = servers
    site_file, _ = copy_site(built, tmp_path / "s")
    _with_notify(site_file, mail.port, hook.url)
    site = load_site(site_file)
    store = open_store(site.store_url)
    try:
        _activate(store, NOW - timedelta(minutes=5))
        assert queue_alarms(site, store, now=NOW) == 2  # one per channel
        assert queue_alarms(site, store, now=NOW) == 0  # queued again: nothing new
        done = deliver(site, store, build_notifiers(site), now=NOW)
        assert (done.sent, done.retrying, done.failed) == (2, 0, 0)
        assert deliver(site, store, build_notifiers(site), now=NOW).sent == 0
    finally:
        store.close()
    (msg,) = mail.messages
    assert msg["Subject"].startswith("[branchwatch] HIGH: low flow on B2-compressor")
    assert "below its minimum 50.0 m3/h" in msg.get_body(("plain",)).get_content()  # type: ignore[union-attr]
    ((headers, body),) = hook.requests
    assert body["condition"] == "low_flow" and body["priority"] == "high"
    assert headers["Idempotency-Key"] == body["key"]


def test_an_old_activation_from_a_backfill_is_not_sent(
    built: Path, tmp_path: Path, servers: tuple[MailServer, HookServer]
) -> None:
    mail, hook = servers
    site_file, _ = copy_site(built, tmp_path / "s")
    _with_notify(site_file, mail.port, hook.url)
    site = load_site(site_file)
    store = open_store(site.store_url)
    try:
        _activate(store, NOW - timedelta(days=3))  # older than fresh_for (6 h)
        assert queue_alarms(site, store, now=NOW) == 0
    finally:
        store.close()


def test_a_server_that_is_down_is_retried_then_given_up_and_shown(
    built: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    site_file, _ = copy_site(built, tmp_path / "s")
    _with_notify(site_file, free_port(), "http://127.0.0.1:9/never", 'retry_for = "1 h"')
    site = load_site(site_file)
    store = open_store(site.store_url)
    try:
        queue_test(site, store, now=NOW)
        first = deliver(site, store, build_notifiers(site), now=NOW)
        assert (first.sent, first.retrying, first.failed) == (0, 2, 0)
        row = store.outbox(status="pending").iloc[0]
        assert row["attempts"] == 1 and row["next_try"] == NOW + timedelta(minutes=1)
        assert deliver(site, store, build_notifiers(site), now=NOW).retrying == 0  # not due
        later = deliver(site, store, build_notifiers(site), now=NOW + timedelta(hours=2))
        assert later.failed == 2
    finally:
        store.close()
    assert main(["status", str(site_file)]) == 0
    out = capsys.readouterr().out
    assert "messages: 0 sent, 2 not sent" in out and "GIVEN UP" in out


def test_a_refused_recipient_is_given_up_at_once(
    built: Path, tmp_path: Path, servers: tuple[MailServer, HookServer]
) -> None:
    mail, hook = servers
    site_file, _ = copy_site(built, tmp_path / "s")
    _with_notify(site_file, mail.port, hook.url)
    mail.refuse_recipients("550 5.1.1 no such mailbox")  # RFC 5321: permanent
    hook.status = 404
    site = load_site(site_file)
    store = open_store(site.store_url)
    try:
        queue_test(site, store, now=NOW)
        done = deliver(site, store, build_notifiers(site), now=NOW)
        assert (done.sent, done.failed) == (0, 2)
        errors = set(store.outbox(status="failed")["last_error"])
    finally:
        store.close()
    assert any("550" in e for e in errors) and any("404" in e for e in errors)


def test_the_digest_carries_the_report_once_per_day(
    built: Path, tmp_path: Path, servers: tuple[MailServer, HookServer]
) -> None:
    mail, hook = servers
    site_file, _ = copy_site(built, tmp_path / "s")
    _with_notify(site_file, mail.port, hook.url)
    site = load_site(site_file)
    store = open_store(site.store_url)
    try:
        day = NOW - timedelta(days=1)
        path = write_report(site, store, day=day, now=NOW)
        assert queue_digest(site, store, path, day=day, now=NOW) == 2
        path = write_report(site, store, day=day, now=NOW + timedelta(hours=1))  # rewritten
        assert queue_digest(site, store, path, day=day, now=NOW + timedelta(hours=1)) == 0
        deliver(site, store, build_notifiers(site), now=NOW + timedelta(hours=1))
    finally:
        store.close()
    (msg,) = mail.messages
    assert "morning report 2026-04-02" in msg["Subject"]
    (att,) = list(msg.iter_attachments())
    assert att.get_filename() == path.name and "<html" in att.get_content().lower()
    assert len(hook.requests) == 1 and hook.requests[0][1]["kind"] == "digest"


def test_notify_verb_sends_a_test_message(
    built: Path, tmp_path: Path, servers: tuple[MailServer, HookServer],
    capsys: pytest.CaptureFixture[str],
) -> None:
    mail, hook = servers
    site_file, _ = copy_site(built, tmp_path / "s")
    _with_notify(site_file, mail.port, hook.url)
    assert main(["notify", str(site_file), "--test"]) == 0
    assert "sent 2;" in capsys.readouterr().out
    assert len(mail.messages) == 1 and len(hook.requests) == 1
    assert "test message" in mail.messages[0]["Subject"]


def test_a_login_without_its_password_is_one_line(
    built: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    site_file, _ = copy_site(built, tmp_path / "s")
    _with_notify(site_file, free_port(), "http://127.0.0.1:9/x")
    text = site_file.read_text().replace(
        'security = "none"', 'security = "none"\nusername = "cwbot"\n'
        'password_env = "BW_TEST_UNSET_SMTP_PASSWORD"')
    site_file.write_text(text)
    assert main(["notify", str(site_file), "--test"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "notify.email.password_env" in err[0]


KILLED_AFTER_QUEUEING = """\
import os, signal, sys
from datetime import UTC, datetime
from adapters.base import open_store
from monitor.site.config import load_site
from monitor.app.notifications import queue_test
site = load_site(sys.argv[1])
store = open_store(site.store_url)
queue_test(site, store, now=datetime.now(UTC))
os.kill(os.getpid(), signal.SIGKILL)  # before anything is sent
"""


def test_sigkill_between_queueing_and_sending_then_restart_sends_once(
    built: Path, tmp_path: Path, servers: tuple[MailServer, HookServer]
) -> None:
    mail, hook = servers
    site_file, _ = copy_site(built, tmp_path / "s")
    _with_notify(site_file, mail.port, hook.url)
    text = site_file.read_text()
    assert "[schedule]" not in text
    site_file.write_text(text.replace("\n[notify]\n",
                                      '\n[schedule]\ningest_every = "10 s"\n\n[notify]\n', 1))
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    killed = subprocess.run([sys.executable, "-c", KILLED_AFTER_QUEUEING, str(site_file)],
                            env=env, cwd=ROOT, capture_output=True, timeout=120)
    assert killed.returncode == -signal.SIGKILL
    assert mail.messages == [] and hook.requests == []
    # the real daemon, restarted: its notify job sends what the killed process queued
    run = subprocess.run([sys.executable, "-m", "monitor.app.cli", "run", str(site_file),
                          "--for", "25"], env=env, cwd=ROOT, capture_output=True, timeout=180)
    assert run.returncode == 0, run.stderr.decode()
    again = subprocess.run([sys.executable, "-m", "monitor.app.cli", "run", str(site_file),
                            "--for", "15"], env=env, cwd=ROOT, capture_output=True, timeout=180)
    assert again.returncode == 0, again.stderr.decode()
    # exactly once each: the test message queued by the killed process, and what the
    # daemon itself had to say (the demo data is months old: the stale-source alarm; the
    # morning digest of the report its start-up pass wrote) — each key once
    keys = [m["X-Branchwatch-Key"] for m in mail.messages]
    hooked = [body["key"] for _, body in hook.requests]
    assert sum(k.startswith("test:") for k in keys) == 1
    assert len(keys) == len(set(keys)) and sorted(keys) == sorted(hooked)
