"""Telling the engineer: alarms at once, the morning digest, through a persisted outbox.

Every message goes through the outbox table of the results store before anything is
sent: it is queued under an idempotency key (an alarm's journal entry id, the report's
date), and the store keeps one row per (key, channel). Queueing is idempotent, so the job
that queues may run again after a restart and nothing doubles; a message queued and not
yet sent when the process is killed is sent after the restart, so nothing is lost. A
kill in the middle of one SMTP or HTTP exchange can still repeat that one message; the
e-mail's Message-ID and the webhook's Idempotency-Key let a receiver drop the copy.

* `queue_alarms` — after each ingest: every alarm that activated within
  ``[notify] fresh_for`` (journal entries are read back, so it does not matter which run
  wrote them) with a priority at or above ``[notify] send_at_once``. An older activation
  (a backfill's replay of last month) is not sent.
* `queue_digest` — after the morning report: a summary in the body, the report attached.
* `queue_test` — ``branchwatch notify SITE --test``; `deliver_now` — ``branchwatch notify``:
  one `deliver` pass and what is left in the outbox.
* `deliver` — the ``notify`` job of the daemon (every minute, in its own thread, so a
  slow server never holds up ingest): sends what is due; a transient failure is tried
  again after 1, 2, 4 … minutes (at most an hour apart) until ``[notify] retry_for`` has
  passed; a permanent one (a refused login or recipient) is given up at once. A message
  given up on is shown by ``status`` and in the next morning report.

Alarm priorities (ISA-18.2 asks for a priority per alarm; these are ours): low flow,
back-flow hazard and lost data are **high** — equipment overheats or water runs the
wrong way; a frozen meter is **medium** — the measurement is lost, not yet the process.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import pandas as pd

from adapters.base import Notifier, NotifyError, NotifyRejected, ResultsStore, notifier_class
from adapters.credentials import read_secret, remember_secret
from adapters.records import Message
from monitor.app.alarms import State, describe_condition
from monitor.site.analysis_sections import NotifySection
from monitor.site.config import Site

log = logging.getLogger(__name__)

__all__ = [
    "PRIORITIES",
    "Delivery",
    "DeliveryReport",
    "alarm_priority",
    "build_notifiers",
    "deliver",
    "deliver_now",
    "queue_alarms",
    "queue_digest",
    "queue_test",
]

PRIORITIES: tuple[str, ...] = ("low", "medium", "high")
#: waits between tries of a message that failed for now: 1, 2, 4 … min, at most 1 h
FIRST_RETRY_S = 60.0
MAX_RETRY_S = 3600.0

SAFETY = ("branchwatch advises; it does not control. Act on this under your site's "
          "procedures; alarms do not replace the plant's safety systems.")


def alarm_priority(condition: str) -> str:
    """The priority of an alarm condition (module docstring)."""
    if condition in ("low_flow", "backflow") or condition.startswith("stale"):
        return "high"
    return "medium"


def build_notifiers(site: Site) -> list[Notifier]:
    """The site's channels, secrets read from where ``[notify]`` says; [] without any.

    Raises `ValueError` naming the key (``notify.email.password_env: …``) when a setting
    or a secret cannot be used.
    """
    sec = site.notify
    if sec is None:
        return []
    out: list[Notifier] = []
    if sec.email is not None:
        e = sec.email
        password = None
        if e.username:
            try:
                password = read_secret(env=e.password_env, secrets_file=e.secrets_file)
            except ValueError as exc:
                raise ValueError(f"notify.email.{exc}") from None
            remember_secret(password)
        email: Any = notifier_class("email")  # constructors differ by kind
        out.append(email(
            host=e.host, port=e.port, security=e.security, sender=e.sender, recipients=e.to,
            username=e.username, password=password, timeout_s=e.timeout, name="email"))
    if sec.webhook is not None:
        w = sec.webhook
        url = w.url
        if url is None:
            try:
                url = read_secret(env=w.url_env, secrets_file=w.secrets_file,
                                  env_key="url_env", what="webhook URL")
            except ValueError as exc:
                raise ValueError(f"notify.webhook.{exc}") from None
        try:
            hook: Any = notifier_class("webhook")
            out.append(hook(url=url, timeout_s=w.timeout, name="webhook"))
        except ValueError as exc:
            raise ValueError(f"notify.webhook: {exc}") from None
    return out


def _channels(site: Site, *, digest: bool = False) -> list[str]:
    sec = site.notify
    if sec is None:
        return []
    return [name for name in ("email", "webhook")
            if getattr(sec, name) is not None and (not digest or getattr(sec, name).digest)]


def _queue(store: ResultsStore, channels: Sequence[str], msg: Message, now: datetime) -> int:
    body = json.dumps({"text": msg.text, "html": msg.html,
                       "attachment_name": msg.attachment_name, "data": dict(msg.data)},
                      default=str)
    return store.queue_messages([
        {"key": msg.key, "channel": ch, "kind": msg.kind, "priority": msg.priority,
         "subject": msg.subject, "body": body, "created": now} for ch in channels
    ])


def _local(site: Site, when: Any) -> str:
    return f"{pd.Timestamp(when).tz_convert(site.timezone):%Y-%m-%d %H:%M}"


def queue_alarms(site: Site, store: ResultsStore, *, now: datetime) -> int:
    """Queue a message for each alarm activation of the last ``fresh_for``; returns how
    many messages were new (an activation already queued is not queued again)."""
    sec: NotifySection | None = site.notify
    channels = _channels(site)
    if sec is None or not channels:
        return 0
    floor = PRIORITIES.index(sec.send_at_once)
    events = store.alarm_events(since=now - timedelta(seconds=sec.fresh_for))
    new = 0
    for e in events.to_dict(orient="records"):
        if e["to_state"] != State.UNACK or e.get("from_state") not in (None, State.NORMAL,
                                                                       State.RTN_UNACK):
            continue  # only an activation is news; acks, shelving and returns are not
        priority = alarm_priority(str(e["condition"]))
        if PRIORITIES.index(priority) < floor:
            continue
        what = describe_condition(str(e["branch"]), str(e["condition"]))
        text = (f"{e['message']}\n\nAlarm: {what} ({priority} priority), active since "
                f"{_local(site, e['time'])} site time at {site.name}.\n"
                f"Acknowledge with: branchwatch alarms SITE --ack {e['branch']}\n\n{SAFETY}")
        msg = Message(
            key=f"alarm:{int(e['id'])}", kind="alarm", priority=priority,
            subject=f"[branchwatch] {priority.upper()}: {what} at {site.name}", text=text,
            data={"site": site.name, "branch": e["branch"], "condition": e["condition"],
                  "time": pd.Timestamp(e["time"]).isoformat()},
        )
        new += _queue(store, channels, msg, now)
    if new:
        log.info("queued %d alarm message(s)", new)
    return new


def queue_digest(site: Site, store: ResultsStore, report: Path, *, day: datetime,
                 now: datetime) -> int:
    """Queue the morning digest for the report of *day*: a summary in the body (open
    findings most urgent first, alarms not normal, messages given up on), the report's
    HTML attached. Keyed by the report's date: one digest per day however often the
    report is rewritten."""
    channels = _channels(site, digest=True)
    if not channels:
        return 0
    from monitor.app.report import attention_order  # the report's own order

    local_day = f"{pd.Timestamp(day).tz_convert(site.timezone):%Y-%m-%d}"
    findings = store.read_findings()
    open_ = findings[findings["end"].isna()] if not findings.empty else findings
    ordered = attention_order(site, open_) if not open_.empty else open_
    alarms = store.read_alarms(active_only=True)
    failed = store.outbox(status="failed")
    lines = [f"{site.name}: morning report for {local_day}.", ""]
    if ordered.empty:
        lines.append("No open findings.")
    else:
        lines.append(f"{len(ordered)} open finding(s), most urgent first:")
        lines += [f"  - {r['branch']} {r['kind'].replace('_', ' ')}: {r['message']}"
                  for r in ordered.head(10).to_dict(orient="records")]
    lines.append("")
    if alarms.empty:
        lines.append("No alarm is active or unacknowledged.")
    else:
        lines.append(f"{len(alarms)} alarm(s) not normal:")
        lines += [f"  - {describe_condition(str(a['branch']), str(a['condition']))}: "
                  f"{a['state']}" for a in alarms.to_dict(orient="records")]
    if not failed.empty:
        lines += ["", f"{len(failed)} message(s) could not be sent; see 'branchwatch status'."]
    lines += ["", f"The full report ({report.name}) is attached.", "", SAFETY]
    msg = Message(
        key=f"digest:{local_day}", kind="digest", priority="low",
        subject=f"[branchwatch] {site.name}: morning report {local_day} "
                f"({len(ordered)} open finding(s), {len(alarms)} alarm(s))",
        text="\n".join(lines), html=report.read_text(encoding="utf-8"),
        attachment_name=report.name, data={"site": site.name, "day": local_day},
    )
    return _queue(store, channels, msg, now)


def queue_test(site: Site, store: ResultsStore, *, now: datetime) -> int:
    """Queue one test message on every channel; returns how many were queued."""
    channels = _channels(site)
    if not channels:
        raise ValueError("the site file has no [notify.email] or [notify.webhook] section: "
                         "there is nobody to send a test message to")
    msg = Message(
        key=f"test:{now.isoformat()}", kind="test", priority="low",
        subject=f"[branchwatch] test message from {site.name}",
        text=(f"This is a test message from branchwatch at {site.name}, queued "
              f"{_local(site, now)} site time. If you read it, alarms and the morning "
              f"digest will reach you the same way.\n\n{SAFETY}"),
        data={"site": site.name},
    )
    return _queue(store, channels, msg, now)


@dataclass(frozen=True)
class Delivery:
    """What one `deliver` pass did."""

    sent: int
    retrying: int
    failed: int


@dataclass(frozen=True)
class DeliveryReport:
    """A `deliver` pass a person asked for, and the outbox after it: the messages still
    waiting for a try (pending) and those given up (failed), as the store lists them."""

    delivery: Delivery
    waiting: pd.DataFrame
    failed: pd.DataFrame


def deliver_now(site: Site, store: ResultsStore, notifiers: Sequence[Notifier], *,
                now: datetime, test: bool = False) -> DeliveryReport:
    """`deliver` at *now* (``branchwatch notify``), after queueing a test message on
    every channel when *test*."""
    if test:
        queue_test(site, store, now=now)
    done = deliver(site, store, notifiers, now=now)
    return DeliveryReport(done, store.outbox(status="pending"), store.outbox(status="failed"))


def _retry_wait(attempts: int) -> timedelta:
    return timedelta(seconds=min(FIRST_RETRY_S * 2 ** max(attempts - 1, 0), MAX_RETRY_S))


def deliver(site: Site, store: ResultsStore, notifiers: Sequence[Notifier], *,
            now: datetime, limit: int = 200) -> Delivery:
    """Send every queued message that is due, each on its own channel (module docstring)."""
    by_name = {n.name: n for n in notifiers}
    retry_for = timedelta(seconds=site.notify.retry_for if site.notify else 86_400.0)
    sent = retrying = failed = 0
    for row in store.outbox(due_before=now, limit=limit).to_dict(orient="records"):
        key, channel = str(row["key"]), str(row["channel"])
        notifier = by_name.get(channel)
        attempts = int(row["attempts"]) + 1
        if notifier is None:
            store.update_message(key, channel, status="failed", attempts=attempts,
                                 last_error=f"channel {channel!r} is no longer configured")
            failed += 1
            continue
        body = json.loads(row["body"])
        msg = Message(key=key, subject=str(row["subject"]), text=body.get("text", ""),
                      kind=str(row["kind"]), priority=str(row["priority"]),
                      html=body.get("html"),
                      attachment_name=body.get("attachment_name") or "report.html",
                      data=body.get("data") or {})
        try:
            notifier.send(msg)
        except NotifyRejected as exc:
            store.update_message(key, channel, status="failed", attempts=attempts,
                                 last_error=str(exc))
            log.error("message %r could not be sent by %s and is given up: %s", msg.subject,
                      channel, exc)
            failed += 1
        except NotifyError as exc:
            created = pd.Timestamp(row["created"]).to_pydatetime()
            if now - created >= retry_for:
                store.update_message(key, channel, status="failed", attempts=attempts,
                                     last_error=str(exc))
                log.error("message %r could not be sent by %s for %s and is given up: %s",
                          msg.subject, channel, retry_for, exc)
                failed += 1
            else:
                wait = _retry_wait(attempts)
                store.update_message(key, channel, attempts=attempts, next_try=now + wait,
                                     last_error=str(exc))
                log.warning("message %r not sent by %s (try %d: %s); next try in %s",
                            msg.subject, channel, attempts, exc, wait)
                retrying += 1
        else:
            store.update_message(key, channel, status="sent", attempts=attempts, sent_at=now,
                                 last_error=None)
            sent += 1
    return Delivery(sent=sent, retrying=retrying, failed=failed)
