"""E-mail and webhook senders against real servers on loopback (tests/servers.py).

What is checked is the protocol behaviour of the standard library and our error
classification: RFC 5321 reply codes (4xx transient, 5xx permanent; RFC 5321 §4.2.1),
STARTTLS (RFC 3207) before login, HTTP status classes (RFC 9110 §15: 5xx server errors,
429 Too Many Requests per RFC 6585 §4, 408 Request Timeout).
"""

from __future__ import annotations

import time
from pathlib import Path

import pytest

from adapters.base import NotifyError, NotifyRejected, notifier_class
from adapters.notify import SmtpNotifier, WebhookNotifier
from adapters.records import Message
from tests.servers import HookServer, MailServer, free_port, silent_server

MSG = Message(key="alarm:B2-compressor:low_flow:2026-06-10T09:50:00Z",
              subject="[branchwatch] Low flow on B2-compressor",
              text="Low flow on B2-compressor: 41.0 m3/h, below its minimum 50.0 m3/h.",
              priority="high")


def _plain(server: MailServer, **kw: object) -> SmtpNotifier:
    return SmtpNotifier(host="127.0.0.1", port=server.port, security="none",
                        sender="branchwatch@plant.example",
                        recipients=["cw-desk@plant.example"], timeout_s=5, **kw)  # type: ignore[arg-type]


def test_aliases_find_the_implementations() -> None:
    assert notifier_class("email") is SmtpNotifier
    assert notifier_class("webhook") is WebhookNotifier


def test_plain_smtp_delivers_subject_body_key_and_attachment() -> None:
    with MailServer() as server:
        report = Message(key="digest:2026-06-10", subject="[branchwatch] Morning report",
                         text="2 open findings", kind="digest", html="<h1>report</h1>",
                         attachment_name="morning-2026-06-10.html")
        _plain(server).send(report)
        (mail,) = server.messages
    assert mail["Subject"] == "[branchwatch] Morning report"
    assert mail["X-Branchwatch-Key"] == "digest:2026-06-10"
    assert mail["Message-ID"].endswith("@plant.example>")
    assert "2 open findings" in mail.get_body(("plain",)).get_content()  # type: ignore[union-attr]
    (att,) = list(mail.iter_attachments())
    assert att.get_filename() == "morning-2026-06-10.html"
    assert att.get_content() == "<h1>report</h1>"


def test_the_same_key_gives_the_same_message_id() -> None:
    with MailServer() as server:
        sender = _plain(server)
        sender.send(MSG)
        sender.send(MSG)
        a, b = server.messages
    assert a["Message-ID"] == b["Message-ID"]  # a receiver can drop the copy
    assert a["Importance"] == "high"


def test_starttls_and_login(tmp_path: Path) -> None:
    with MailServer(tls_folder=tmp_path, login=("cwbot", "pa55-word")) as server:
        ok = SmtpNotifier(host="127.0.0.1", port=server.port, security="starttls",
                          sender="branchwatch@plant.example", recipients=["a@plant.example"],
                          username="cwbot", password="pa55-word",
                          tls_context=server.client_context, timeout_s=5)
        ok.send(MSG)
        assert len(server.messages) == 1
        bad = SmtpNotifier(host="127.0.0.1", port=server.port, security="starttls",
                           sender="branchwatch@plant.example", recipients=["a@plant.example"],
                           username="cwbot", password="wrong",
                           tls_context=server.client_context, timeout_s=5)
        before = server.auth_attempts
        with pytest.raises(NotifyRejected, match="refused the login") as err:
            bad.send(MSG)
        assert "wrong" not in str(err.value) and "wrong" not in repr(bad)
        assert server.auth_attempts - before == 1  # tried once: no lock-out by retries


def test_starttls_refused_by_a_server_that_cannot() -> None:
    with MailServer() as server:
        sender = SmtpNotifier(host="127.0.0.1", port=server.port, security="starttls",
                              sender="b@plant.example", recipients=["a@plant.example"],
                              timeout_s=5)
        with pytest.raises(NotifyRejected, match="STARTTLS"):
            sender.send(MSG)
        assert server.messages == []


def test_reply_codes_are_classified() -> None:
    with MailServer() as server:
        sender = _plain(server)
        server.refuse_recipients("451 4.3.0 mailbox busy, try again later")
        with pytest.raises(NotifyError):  # RFC 5321: 4xx is transient
            sender.send(MSG)
        server.refuse_recipients("550 5.1.1 no such user")
        with pytest.raises(NotifyRejected, match="refused"):  # 5xx is permanent
            sender.send(MSG)
        assert server.messages == []


def test_refused_hanging_and_dropped_connections_are_transient() -> None:
    port = free_port()  # nobody listens there
    sender = SmtpNotifier(host="127.0.0.1", port=port, security="none",
                          sender="b@plant.example", recipients=["a@plant.example"], timeout_s=1)
    with pytest.raises(NotifyError, match="could not be reached"):
        sender.send(MSG)
    for mode in ("hang", "drop"):
        with silent_server(mode) as port:
            sender = SmtpNotifier(host="127.0.0.1", port=port, security="none",
                                  sender="b@plant.example", recipients=["a@plant.example"],
                                  timeout_s=1)
            t0 = time.monotonic()
            with pytest.raises(NotifyError):
                sender.send(MSG)
            assert time.monotonic() - t0 < 5  # bounded by the timeout, never blocks


def test_malformed_addresses_are_refused_with_their_text() -> None:
    with pytest.raises(ValueError, match="'ops desk' is not an e-mail address"):
        SmtpNotifier(host="mail", sender="b@plant.example", recipients=["ops desk"])
    with pytest.raises(ValueError, match="sender"):
        SmtpNotifier(host="mail", sender="nobody", recipients=["a@plant.example"])
    with pytest.raises(ValueError, match="needs a password"):
        SmtpNotifier(host="mail", sender="b@plant.example", recipients=["a@plant.example"],
                     username="cwbot")


def test_webhook_posts_json_with_the_key() -> None:
    with HookServer() as hook:
        sender = WebhookNotifier(url=hook.url, timeout_s=5)
        sender.send(Message(key="k1", subject="s", text="t", data={"site": "Loop B"}))
        ((headers, body),) = hook.requests
    assert headers["Idempotency-Key"] == "k1"
    assert body == {"key": "k1", "kind": "alarm", "priority": "medium", "subject": "s",
                    "text": "t", "site": "Loop B"}
    assert "s3cret" not in repr(sender) and "s3cret" not in sender.describe()


@pytest.mark.parametrize(("status", "error"), [(500, NotifyError), (503, NotifyError),
                                               (429, NotifyError), (400, NotifyRejected),
                                               (404, NotifyRejected)])
def test_webhook_status_classes(status: int, error: type[Exception]) -> None:
    with HookServer() as hook:
        hook.status = status
        with pytest.raises(error, match=str(status)) as err:
            WebhookNotifier(url=hook.url, timeout_s=5).send(MSG)
    assert "s3cret" not in str(err.value)


def test_webhook_that_never_answers_times_out() -> None:
    with silent_server("hang") as port:
        sender = WebhookNotifier(url=f"http://127.0.0.1:{port}/x", timeout_s=1)
        t0 = time.monotonic()
        with pytest.raises(NotifyError, match="did not answer"):
            sender.send(MSG)
        assert time.monotonic() - t0 < 5


def test_webhook_url_must_be_http() -> None:
    with pytest.raises(ValueError, match="http"):
        WebhookNotifier(url="ftp://plant.example/x")
