"""Telling people: e-mail over SMTP and a JSON webhook.

Two `Notifier` implementations (interface in `adapters.base`):

* ``email`` — `SmtpNotifier`: standard-library `smtplib` and `email`; plain SMTP, STARTTLS
  (``security = "starttls"``, the default) or SMTP over TLS (``"tls"``), and a login when a
  user is given. The password comes from an environment variable or a secrets file (the
  site file only names where); it is held here, never logged, and masked in `repr`.
* ``webhook`` — `WebhookNotifier`: one HTTP POST of a JSON object per message.

Each message carries an idempotency key (`Message.key`): the e-mail's ``Message-ID`` and
the webhook's ``Idempotency-Key`` header are derived from it, so a receiver that keeps
them can drop a copy; the outbox in the store (`monitor.app.notifications`) is what makes
branchwatch itself send each key once.

A send either succeeds or raises one of two errors, so the outbox knows whether to try
again: `NotifyError` (the server refused for now, timed out or dropped the connection:
retry later) and `NotifyRejected` (the message can never go as it is: login refused, a
recipient refused, a webhook answering 4xx: retrying would only repeat it — and retrying
a wrong password can lock the account).
"""

from __future__ import annotations

import hashlib
import json
import logging
import re
import smtplib
import ssl
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Iterable, Mapping
from email.message import EmailMessage
from email.utils import formatdate, parseaddr
from typing import Any, ClassVar, Literal

from adapters.base import Notifier, NotifyError, NotifyRejected
from adapters.records import Message

log = logging.getLogger(__name__)

__all__ = ["SmtpNotifier", "WebhookNotifier", "check_address"]

#: Seconds a connection or an answer may take before the attempt counts as failed; the
#: outbox tries again later, so one slow server never holds the daemon's jobs up.
DEFAULT_TIMEOUT_S = 10.0

_ADDRESS = re.compile(r"^[^@\s<>(),;:\"\[\]]+@[A-Za-z0-9](?:[A-Za-z0-9.-]*[A-Za-z0-9])?$")


def check_address(text: str, *, what: str = "address") -> str:
    """*text* as a bare e-mail address, or `ValueError` naming it.

    >>> check_address("Utilities desk <cw-desk@plant.example>")
    'cw-desk@plant.example'
    """
    _, addr = parseaddr(text)
    if not addr or not _ADDRESS.match(addr):
        raise ValueError(f"{what} {text!r} is not an e-mail address like name@plant.example")
    return addr


def _message_id(key: str, domain: str) -> str:
    digest = hashlib.sha256(key.encode("utf-8")).hexdigest()[:32]
    return f"<{digest}@{domain}>"


class SmtpNotifier(Notifier):
    """E-mail over SMTP to a fixed list of recipients.

    Parameters
    ----------
    host, port : the SMTP server (port default: 587 for STARTTLS, 465 for TLS, 25 plain)
    sender : the From address
    recipients : the To addresses
    security : ``"starttls"`` (upgrade after connecting; refused if the server cannot),
        ``"tls"`` (TLS from the start) or ``"none"`` (a relay on a trusted network)
    username, password : a login, when the server wants one
    timeout_s : connect and answer timeout [s]
    tls_context : the TLS settings (default: the system's, certificates verified)
    """

    alias: ClassVar[str] = "email"

    def __init__(
        self, *, host: str, sender: str, recipients: Iterable[str], port: int | None = None,
        security: Literal["starttls", "tls", "none"] = "starttls", username: str | None = None,
        password: str | None = None, timeout_s: float = DEFAULT_TIMEOUT_S,
        tls_context: ssl.SSLContext | None = None, name: str = "email",
    ) -> None:
        super().__init__(name=name)
        if security not in ("starttls", "tls", "none"):
            raise ValueError(f"security must be 'starttls', 'tls' or 'none', got {security!r}")
        if not host:
            raise ValueError("host must name the SMTP server")
        if username and password is None:
            raise ValueError(f"a login as {username!r} needs a password (from password_env "
                             "or secrets_file)")
        self.host = host
        self.port = port or {"starttls": 587, "tls": 465, "none": 25}[security]
        self.sender = check_address(sender, what="sender")
        self.recipients = [check_address(r, what="recipient") for r in recipients]
        if not self.recipients:
            raise ValueError("recipients must name at least one address")
        self.security = security
        self.username = username
        self._password = password
        self.timeout_s = timeout_s
        self._tls = tls_context

    def __repr__(self) -> str:
        login = f" as {self.username!r} (password ***)" if self.username else ""
        return (f"SmtpNotifier({self.host}:{self.port}, {self.security}{login}, "
                f"to {', '.join(self.recipients)})")

    def describe(self) -> str:
        return f"e-mail via {self.host}:{self.port} to {', '.join(self.recipients)}"

    def compose(self, message: Message) -> EmailMessage:
        """The e-mail for *message*: text body, the HTML report attached when there is one."""
        mail = EmailMessage()
        mail["From"] = self.sender
        mail["To"] = ", ".join(self.recipients)
        mail["Subject"] = message.subject
        mail["Date"] = formatdate(localtime=False)
        mail["Message-ID"] = _message_id(message.key, self.sender.split("@", 1)[1])
        mail["X-Branchwatch-Key"] = message.key
        if message.priority == "high":
            mail["Importance"] = "high"  # RFC 2156
        mail.set_content(message.text)
        if message.html is not None:
            mail.add_attachment(message.html.encode("utf-8"), maintype="text", subtype="html",
                                filename=message.attachment_name)
        return mail

    def send(self, message: Message) -> None:
        mail = self.compose(message)
        where = f"SMTP server {self.host}:{self.port}"
        try:
            smtp: smtplib.SMTP
            if self.security == "tls":
                smtp = smtplib.SMTP_SSL(self.host, self.port, timeout=self.timeout_s,
                                        context=self._context())
            else:
                smtp = smtplib.SMTP(self.host, self.port, timeout=self.timeout_s)
            with smtp:
                smtp.ehlo()
                if self.security == "starttls":
                    if not smtp.has_extn("starttls"):
                        raise NotifyRejected(
                            f"{where} does not offer STARTTLS; set security = 'tls' or, on a "
                            "trusted relay only, 'none'")
                    smtp.starttls(context=self._context())
                    smtp.ehlo()
                if self.username:
                    self._login(smtp, where)
                refused = smtp.send_message(mail)
        except smtplib.SMTPAuthenticationError as exc:
            raise NotifyRejected(f"{where} refused the login as {self.username!r} "
                                 f"({exc.smtp_code}); check the user and password") from None
        except smtplib.SMTPRecipientsRefused as exc:
            codes = [code for code, _ in exc.recipients.values()]
            err = NotifyError if all(400 <= c < 500 for c in codes) else NotifyRejected
            raise err(f"{where} refused the recipients " + ", ".join(
                f"{a} ({c} {m.decode('utf-8', 'replace') if isinstance(m, bytes) else m})"
                for a, (c, m) in exc.recipients.items())) from None
        except smtplib.SMTPSenderRefused as exc:
            raise NotifyRejected(f"{where} refused the sender {exc.sender!r} "
                                 f"({exc.smtp_code})") from None
        except smtplib.SMTPResponseException as exc:
            text = exc.smtp_error.decode("utf-8", "replace") if isinstance(
                exc.smtp_error, bytes) else str(exc.smtp_error)
            err = NotifyError if 400 <= exc.smtp_code < 500 else NotifyRejected
            raise err(f"{where} answered {exc.smtp_code} {text}") from None
        except (smtplib.SMTPException, OSError) as exc:  # refused, timed out, dropped
            raise NotifyError(f"{where} could not be reached or dropped the connection "
                              f"({type(exc).__name__}: {exc})") from None
        if refused:
            raise NotifyRejected(f"{where} refused some recipients: {', '.join(refused)}")
        log.info("sent %r to %s", message.subject, ", ".join(self.recipients))

    def _login(self, smtp: smtplib.SMTP, where: str) -> None:
        """One login attempt with one mechanism: `smtplib.SMTP.login` tries every
        mechanism the server offers in turn, which repeats a wrong password up to three
        times — enough to lock some accounts."""
        offered = smtp.esmtp_features.get("auth", "").upper().split()
        mechanism = next((m for m in ("PLAIN", "LOGIN") if m in offered), None)
        if mechanism is None:
            raise NotifyRejected(f"{where} offers no PLAIN or LOGIN authentication "
                                 f"(offers: {' '.join(offered) or 'none'})")
        assert self._password is not None and self.username is not None
        smtp.user, smtp.password = self.username, self._password
        smtp.auth(mechanism, getattr(smtp, f"auth_{mechanism.lower()}"))

    def _context(self) -> ssl.SSLContext:
        return self._tls or ssl.create_default_context()


class WebhookNotifier(Notifier):
    """One HTTP POST of a JSON object per message.

    The object: ``key``, ``kind``, ``priority``, ``subject``, ``text``, ``site`` and the
    message's ``data``; the header ``Idempotency-Key`` repeats the key. A 2xx answer is
    delivered; 408, 425, 429 and 5xx are tried again later; any other answer is final.
    The URL (which may carry a token) is only shown as scheme, host and path.
    """

    alias: ClassVar[str] = "webhook"
    RETRY_STATUS: ClassVar[frozenset[int]] = frozenset({408, 425, 429})

    def __init__(self, *, url: str, timeout_s: float = DEFAULT_TIMEOUT_S,
                 headers: Mapping[str, str] | None = None, name: str = "webhook") -> None:
        super().__init__(name=name)
        parts = urllib.parse.urlsplit(url)
        if parts.scheme not in ("http", "https") or not parts.hostname:
            raise ValueError("webhook url must be an http:// or https:// address")
        self._url = url
        port = f":{parts.port}" if parts.port else ""
        self.shown = f"{parts.scheme}://{parts.hostname}{port}{parts.path}"
        self.timeout_s = timeout_s
        self.headers = dict(headers or {})

    def __repr__(self) -> str:
        return f"WebhookNotifier({self.shown})"

    def describe(self) -> str:
        return f"webhook {self.shown}"

    def payload(self, message: Message) -> dict[str, Any]:
        return {"key": message.key, "kind": message.kind, "priority": message.priority,
                "subject": message.subject, "text": message.text, **dict(message.data)}

    def send(self, message: Message) -> None:
        body = json.dumps(self.payload(message), default=str).encode("utf-8")
        request = urllib.request.Request(
            self._url, data=body, method="POST",
            headers={"Content-Type": "application/json", "Idempotency-Key": message.key,
                     "User-Agent": "branchwatch", **self.headers},
        )
        where = f"webhook {self.shown}"
        try:
            with urllib.request.urlopen(request, timeout=self.timeout_s) as answer:
                status = int(answer.status)
        except urllib.error.HTTPError as exc:
            status = int(exc.code)
            exc.close()
            retry = status >= 500 or status in self.RETRY_STATUS
            raise (NotifyError if retry else NotifyRejected)(
                f"{where} answered {status} {exc.reason}") from None
        except OSError as exc:  # URLError, timeouts, refused connections
            reason = getattr(exc, "reason", exc)
            raise NotifyError(f"{where} could not be reached or did not answer in "
                              f"{self.timeout_s:g} s ({reason})") from None
        if not 200 <= status < 300:
            raise NotifyError(f"{where} answered {status}")
        log.info("posted %r to %s", message.subject, self.shown)
