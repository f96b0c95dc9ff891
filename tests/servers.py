"""Real servers on loopback for the notification tests: SMTP (aiosmtpd) and HTTP; and
`drop_schemas`, which clears away what a test made on the database servers.

`MailServer` runs aiosmtpd's controller on 127.0.0.1 with an optional STARTTLS
certificate (made with the openssl command line) and an optional login; every message it
accepts is kept in ``messages``. `HookServer` is a threaded `http.server` whose answers
the test sets (status code, delay) and which keeps every request it got.
"""

from __future__ import annotations

import email
import email.policy
import json
import socket
import ssl
import subprocess
import threading
import time
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from email.message import EmailMessage
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword


def drop_schemas(url: str, names: Iterable[str]) -> None:
    """Drop the schemas (PostgreSQL) or databases (MariaDB) *names* on the server at
    *url*, with everything in them; a name that does not exist is passed over."""
    import sqlalchemy as sa

    engine = sa.create_engine(url)
    quote = engine.dialect.identifier_preparer.quote_identifier
    with engine.begin() as conn:
        for name in names:
            if engine.dialect.name == "postgresql":
                conn.exec_driver_sql(f"DROP SCHEMA IF EXISTS {quote(name)} CASCADE")
            else:
                conn.exec_driver_sql(f"DROP DATABASE IF EXISTS {quote(name)}")
    engine.dispose()


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def self_signed(folder: Path) -> tuple[Path, Path]:
    """A throw-away certificate and key for localhost (openssl req)."""
    cert, key = folder / "cert.pem", folder / "key.pem"
    subprocess.run(
        ["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "1",
         "-subj", "/CN=localhost", "-addext", "subjectAltName=IP:127.0.0.1,DNS:localhost",
         "-keyout", str(key), "-out", str(cert)],
        check=True, capture_output=True,
    )
    return cert, key


@dataclass
class _Handler:
    messages: list[EmailMessage] = field(default_factory=list)
    answer_rcpt: str | None = None  # e.g. "451 4.3.0 try again later"
    lock: threading.Lock = field(default_factory=threading.Lock)

    async def handle_RCPT(self, server: Any, session: Any, envelope: Any, address: str,
                          rcpt_options: Any) -> str:
        if self.answer_rcpt:
            return self.answer_rcpt
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:
        msg = email.message_from_bytes(envelope.content, policy=email.policy.default)
        with self.lock:
            self.messages.append(msg)  # type: ignore[arg-type]
        return "250 Message accepted"


class MailServer:
    """aiosmtpd on loopback; ``login`` (user, password) turns on AUTH (over STARTTLS)."""

    def __init__(self, *, tls_folder: Path | None = None,
                 login: tuple[str, str] | None = None) -> None:
        self.handler = _Handler()
        self.auth_attempts = 0
        self.port = free_port()
        kwargs: dict[str, Any] = {}
        self.client_context: ssl.SSLContext | None = None
        if tls_folder is not None:
            cert, key = self_signed(tls_folder)
            server_ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
            server_ctx.load_cert_chain(str(cert), str(key))
            kwargs["tls_context"] = server_ctx
            kwargs["require_starttls"] = True
            self.client_context = ssl.create_default_context(cafile=str(cert))
        if login is not None:
            kwargs["authenticator"] = self._authenticator(login)
            kwargs["auth_require_tls"] = tls_folder is not None
        self.controller = Controller(self.handler, hostname="127.0.0.1", port=self.port,
                                     **kwargs)

    def _authenticator(self, login: tuple[str, str]) -> Any:
        def check(server: Any, session: Any, envelope: Any, mechanism: str,
                  auth_data: Any) -> AuthResult:
            self.auth_attempts += 1
            ok = (isinstance(auth_data, LoginPassword)
                  and (auth_data.login.decode(), auth_data.password.decode()) == login)
            return AuthResult(success=ok, handled=False)
        return check

    @property
    def messages(self) -> list[EmailMessage]:
        with self.handler.lock:
            return list(self.handler.messages)

    def refuse_recipients(self, answer: str | None) -> None:
        self.handler.answer_rcpt = answer

    def __enter__(self) -> MailServer:
        self.controller.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.controller.stop()


class HookServer:
    """A webhook receiver on loopback: answers ``status`` after ``delay_s``."""

    def __init__(self) -> None:
        self.requests: list[tuple[dict[str, str], dict[str, Any]]] = []
        self.status = 200
        self.delay_s = 0.0
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                length = int(self.headers.get("Content-Length", "0"))
                body = json.loads(self.rfile.read(length) or b"{}")
                time.sleep(outer.delay_s)
                outer.requests.append((dict(self.headers.items()), body))
                self.send_response(outer.status)
                self.end_headers()
                self.wfile.write(b"{}")

            def log_message(self, *args: Any) -> None:  # keep the test output quiet
                pass

        self.httpd = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.httpd.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.httpd.server_address[1]}/hooks/cw?token=s3cret"
        self._thread = threading.Thread(target=self.httpd.serve_forever, daemon=True)

    def __enter__(self) -> HookServer:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.httpd.shutdown()
        self.httpd.server_close()


@contextmanager
def silent_server(mode: str) -> Iterator[int]:
    """A TCP port that accepts and then never answers (``mode='hang'``) or closes the
    connection at once (``'drop'``)."""
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    sock.listen(8)
    port = int(sock.getsockname()[1])
    stop = threading.Event()
    held: list[socket.socket] = []

    def serve() -> None:
        sock.settimeout(0.2)
        while not stop.is_set():
            try:
                conn, _ = sock.accept()
            except OSError:
                continue
            if mode == "drop":
                conn.close()
            else:
                held.append(conn)

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    try:
        yield port
    finally:
        stop.set()
        thread.join(2)
        for c in held:
            c.close()
        sock.close()
