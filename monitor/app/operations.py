"""What a person asks of the stored state: how far everything has got, and the alarm
actions of the ISA-18.2 life cycle.

Each function reads (and, for an alarm action, writes) the results store through
`adapters.base.ResultsStore` and returns a frozen record; the command line only prints
them (text or JSON). The alarm actions are those of `monitor.app.alarms`: acknowledge,
shelve, unshelve, remove from service, return to service, and reset of a latched alarm
(allowed once its condition has returned to normal and it was acknowledged).

`run_recorded` runs a job and records the run (and its failure) in the store's job log.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from enum import StrEnum
from typing import Any

import pandas as pd

from adapters.base import ResultsStore
from monitor.app import alarms as life
from monitor.app.alarm_points import (
    SOURCE_ALARM_BRANCH,
    alarm_row,
    alarm_state_from_row,
    stale_after,
)
from monitor.app.alarms import AlarmState, State
from monitor.site.config import Site

__all__ = [
    "AlarmAction",
    "AlarmActionResult",
    "AlarmChange",
    "AlarmLine",
    "AlarmListing",
    "AlarmRefusal",
    "JobRun",
    "JournalEntry",
    "OpenFindingLine",
    "OperationError",
    "ShelfEndError",
    "StatusSummary",
    "TagFreshness",
    "UnsentMessage",
    "alarm_action",
    "alarm_listing",
    "jsonable",
    "run_recorded",
    "status_summary",
]

#: Alarm names that are no branch of the site file: the header's alarms and the
#: source's stale-data alarm.
NON_BRANCH_ALARMS = ("header", SOURCE_ALARM_BRANCH)
#: How many of the newest journal entries `alarm_listing` returns.
JOURNAL_TAIL = 10
#: The states of a queued message, in the order status counts them.
MESSAGE_STATES = ("pending", "sent", "failed")


class OperationError(ValueError):
    """An operation the stored state does not allow (no such alarm, a shelf into the
    past); the message says what to give instead."""


class ShelfEndError(OperationError):
    """A shelf without an end, or one that ends at or before now."""


def jsonable(value: Any) -> Any:
    """*value* with everything JSON cannot hold as text (times as ``str``)."""
    return json.loads(json.dumps(value, default=str))


def run_recorded(store: ResultsStore, job: str, func: Callable[[], Any]) -> Any:
    """Run *func*, recording the run (and its failure) in the store's job log; the
    result's ``to_json_dict()``, where it has one, is kept as the run's detail."""
    started = datetime.now(UTC)
    store.record_job_run(job, started, None, "running")
    try:
        result = func()
    except BaseException as exc:
        store.record_job_run(job, started, datetime.now(UTC), "failed",
                             {"error": f"{type(exc).__name__}: {exc}"})
        raise
    detail = result.to_json_dict() if hasattr(result, "to_json_dict") else {}
    store.record_job_run(job, started, datetime.now(UTC), "ok", jsonable(detail))
    return result


# ---------------------------------------------------------------------------------------
# status


@dataclass(frozen=True)
class TagFreshness:
    """The newest stored reading of a tag: ``last`` None when none is stored.

    age_s : how old it is at the summary's time [s]
    """

    tag: str
    last: datetime | None
    age_s: float | None
    stale: bool


@dataclass(frozen=True)
class JobRun:
    """One row of the job log. ``unfinished``: it says running, but a newer run of the
    same job started since (it was killed or crashed before recording its end)."""

    record: Mapping[str, Any]  # the stored row, all columns (id, job, started, ...)
    job: str
    started: datetime
    status: str
    unfinished: bool


@dataclass(frozen=True)
class OpenFindingLine:
    """A finding without an end, as stored (``evidence`` the stored numbers)."""

    branch: str
    kind: str
    start: datetime
    evidence: Mapping[str, Any]
    message: str


@dataclass(frozen=True)
class UnsentMessage:
    """A message of the outbox not sent (``status`` pending or failed)."""

    key: str
    channel: str
    subject: str
    status: str
    attempts: int
    last_error: str | None


@dataclass(frozen=True)
class StatusSummary:
    """How far ingest and analysis have got, the last job runs, open findings, the
    quarantine and the outbox, at time ``now``.

    stale_after_s : age beyond which a tag is stale [s]
    tags : every tag of the site file and every tag with stored readings, by name
    fits_last : (branch, end of its last analysed window), as the store orders them
    corrections : corrected readings journalled: applied, refused, and applied ones
        still waiting for their windows' re-analysis (pending)
    messages : count of outbox messages by state (`MESSAGE_STATES`)
    notify_configured : the site file has a [notify] section
    """

    site: str
    timezone: str
    now: datetime
    stale_after_s: float
    tags: tuple[TagFreshness, ...]
    fits_last: tuple[tuple[str, datetime], ...]
    jobs: tuple[JobRun, ...]
    open_findings: tuple[OpenFindingLine, ...]
    quarantine: Mapping[str, int]
    corrections: Mapping[str, int]
    messages: Mapping[str, int]
    not_sent: tuple[UnsentMessage, ...]
    notify_configured: bool

    @property
    def stale_tags(self) -> tuple[str, ...]:
        """The stale tags (no reading, or an old one), by name."""
        return tuple(t.tag for t in self.tags if t.stale)

    @property
    def readings_stored(self) -> bool:
        return any(t.last is not None for t in self.tags)

    def to_json_dict(self) -> dict[str, Any]:
        """The summary as ``status --json`` prints it (times ISO 8601, UTC)."""
        seen = [(t.tag, t.last, t.age_s or 0.0) for t in self.tags if t.last is not None]
        return {
            "site": self.site,
            "readings_last": {tag: pd.Timestamp(last).isoformat() for tag, last, _ in seen},
            "readings_age_s": {tag: round(float(age), 1) for tag, _, age in seen},
            "stale_after_s": self.stale_after_s,
            "stale_tags": list(self.stale_tags),
            "fits_last": {b: pd.Timestamp(t).isoformat() for b, t in self.fits_last},
            "jobs": jsonable([dict(j.record) for j in self.jobs]),
            "open_findings": len(self.open_findings),
            "quarantine": dict(self.quarantine),
            "corrections": dict(self.corrections),
            "messages": dict(self.messages),
            "messages_not_sent": jsonable([
                {"key": m.key, "channel": m.channel, "subject": m.subject,
                 "status": m.status, "attempts": m.attempts, "last_error": m.last_error}
                for m in self.not_sent]),
        }


def status_summary(site: Site, store: ResultsStore, *, now: datetime, runs: int = 10
                   ) -> StatusSummary:
    """The status of *site* as its store holds it at *now* (the newest *runs* job runs)."""
    marks = store.watermarks()
    job_rows = store.job_runs(limit=runs)
    findings = store.read_findings()
    quarantine = store.quarantine_counts()
    outbox = store.outbox()
    corrections = store.correction_counts()
    limit_s = stale_after(site)
    newest = {str(t): pd.Timestamp(v) for t, v in
              zip(marks.readings["tag"], marks.readings["last"], strict=True)}
    tags = []
    for tag in sorted(set(site.tags) | set(newest)):
        if tag not in newest:
            tags.append(TagFreshness(tag, None, None, True))
            continue
        age = (now - newest[tag].to_pydatetime()).total_seconds()
        tags.append(TagFreshness(tag, newest[tag], age, age > limit_s))
    fit_ends = pd.to_datetime(marks.fits["last_window_end"], utc=True)
    fits_last = tuple((str(b), t) for b, t in zip(marks.fits["branch"], fit_ends, strict=True))
    return StatusSummary(
        site=site.name, timezone=site.timezone, now=now, stale_after_s=limit_s,
        tags=tuple(tags), fits_last=fits_last, jobs=_job_runs(job_rows),
        open_findings=_open_findings(findings), quarantine=quarantine,
        corrections=corrections,
        messages={st: int((outbox["status"] == st).sum()) if not outbox.empty else 0
                  for st in MESSAGE_STATES},
        not_sent=_not_sent(outbox), notify_configured=site.notify is not None,
    )  # fmt: skip


def _job_runs(frame: pd.DataFrame) -> tuple[JobRun, ...]:
    out = []
    later: set[str] = set()  # jobs with a newer run than the row at hand (newest first)
    for rec in frame.to_dict(orient="records"):
        job = str(rec["job"])
        out.append(JobRun({str(k): v for k, v in rec.items()}, job,
                          pd.Timestamp(rec["started"]), str(rec["status"]),
                          unfinished=rec["status"] == "running" and job in later))
        later.add(job)
    return tuple(out)


def _open_findings(findings: pd.DataFrame) -> tuple[OpenFindingLine, ...]:
    if findings.empty:
        return ()
    rows = findings[findings["end"].isna()].to_dict(orient="records")
    return tuple(OpenFindingLine(str(r["branch"]), str(r["kind"]), pd.Timestamp(r["start"]),
                                 dict(r["evidence"] or {}), str(r["message"]))
                 for r in rows)  # fmt: skip


def _not_sent(outbox: pd.DataFrame) -> tuple[UnsentMessage, ...]:
    if outbox.empty:
        return ()
    rows = outbox[outbox["status"] != "sent"].to_dict(orient="records")
    return tuple(UnsentMessage(str(r["key"]), str(r["channel"]), str(r["subject"]),
                               str(r["status"]), int(r["attempts"]),
                               None if not r["last_error"] else str(r["last_error"]))
                 for r in rows)  # fmt: skip


# ---------------------------------------------------------------------------------------
# alarms


class AlarmAction(StrEnum):
    """What an operator does to an alarm (ISA-18.2 terms)."""

    ACKNOWLEDGE = "acknowledge"
    SHELVE = "shelve"
    UNSHELVE = "unshelve"
    REMOVE_FROM_SERVICE = "remove_from_service"
    RETURN_TO_SERVICE = "return_to_service"
    RESET = "reset"


@dataclass(frozen=True)
class AlarmLine:
    """A stored alarm: ``since`` the time it was annunciated (None if never)."""

    branch: str
    condition: str
    state: str
    since: datetime | None
    message: str


@dataclass(frozen=True)
class JournalEntry:
    """One state change of the alarm journal (``from_state`` None: first seen)."""

    time: datetime
    branch: str
    condition: str
    alarm: str  # the alarm in words (`monitor.app.alarms.describe_condition`)
    from_state: str | None
    to_state: str


@dataclass(frozen=True)
class AlarmListing:
    """The alarms (those not normal, unless all were asked for) and the newest
    journal entries, oldest first."""

    alarms: tuple[AlarmLine, ...]
    journal: tuple[JournalEntry, ...]
    all_shown: bool

    def to_json_dict(self) -> dict[str, Any]:
        """The listing as ``alarms --json`` prints it (times ISO 8601, UTC)."""
        return jsonable({
            "alarms": [{**dataclasses.asdict(a), "since": _iso(a.since)} for a in self.alarms],
            "journal": [{**dataclasses.asdict(e), "time": _iso(e.time)} for e in self.journal],
        })


@dataclass(frozen=True)
class AlarmChange:
    """An alarm whose state an action changed."""

    branch: str
    condition: str
    from_state: State
    to_state: State


@dataclass(frozen=True)
class AlarmRefusal:
    """An alarm an action was refused for, and why, in a sentence that says what to do."""

    branch: str
    condition: str
    reason: str


@dataclass(frozen=True)
class AlarmActionResult:
    """What an action did: the changes (stored, each journalled) and the refusals; an
    alarm in neither had nothing to do."""

    action: AlarmAction
    branch: str
    changes: tuple[AlarmChange, ...]
    refusals: tuple[AlarmRefusal, ...]

    def to_json_dict(self) -> dict[str, Any]:
        """The result as ``alarms --json`` prints it."""
        return jsonable({"action": self.action.value, "branch": self.branch,
                         "changes": [dataclasses.asdict(c) for c in self.changes],
                         "refused": [dataclasses.asdict(r) for r in self.refusals]})


def _iso(t: datetime | None) -> str | None:
    return None if t is None else pd.Timestamp(t).isoformat()


def alarm_listing(store: ResultsStore, *, show_all: bool = False) -> AlarmListing:
    """The stored alarms (all, or those not normal) and the last `JOURNAL_TAIL` entries."""
    frame = store.read_alarms()
    shown = frame if show_all else frame[frame["state"] != State.NORMAL.value]
    alarms = tuple(
        AlarmLine(str(r["branch"]), str(r["condition"]), str(r["state"]),
                  None if r.get("activated") is None or pd.isna(r.get("activated"))
                  else pd.Timestamp(r["activated"]), str(r["message"]))
        for r in shown.to_dict(orient="records"))  # fmt: skip
    journal = store.alarm_events()
    entries = tuple(
        JournalEntry(pd.Timestamp(r["time"]), str(r["branch"]), str(r["condition"]),
                     life.describe_condition(str(r["branch"]), str(r["condition"])),
                     r["from_state"] or None, str(r["to_state"]))
        for r in journal.tail(JOURNAL_TAIL).to_dict(orient="records"))  # fmt: skip
    return AlarmListing(alarms, entries, show_all)


def alarm_action(
    site: Site, store: ResultsStore, action: AlarmAction, branch: str, *,
    now: datetime, condition: str | None = None, until: datetime | None = None, by: str = "",
) -> AlarmActionResult:
    """Apply *action* to every alarm of *branch* (or only its *condition*) at *now*,
    store the changed states (the store journals each change) and say what it did.

    *until* (UTC) is the end of a shelf, needed by `AlarmAction.SHELVE` only. A reset is
    refused, alarm by alarm, while the condition is still active or the alarm is not
    acknowledged. Raises `OperationError` for an alarm that was never evaluated, a
    shelf without an end or one into the past (`ShelfEndError`), and `KeyError` for an
    unknown branch.
    """
    if branch not in NON_BRANCH_ALARMS:
        site.branch(branch)  # an unknown name is refused with the list of branches
    if action == AlarmAction.SHELVE and until is not None and until <= now:
        raise ShelfEndError(f"the shelf end {until.isoformat()} is not after now "
                            f"({now.isoformat()})")
    frame = store.read_alarms()
    rows = [r for r in frame.to_dict(orient="records") if str(r["branch"]) == branch
            and (condition is None or str(r["condition"]) == condition)]
    if not rows:
        raise OperationError(f"branch {branch!r} has no alarm"
                             + (f" {condition!r}" if condition else "")
                             + " yet (never evaluated)")
    if action == AlarmAction.SHELVE and until is None:
        raise ShelfEndError("a shelf needs its end time")
    changes, refusals, stored = [], [], []
    for row in rows:
        state = alarm_state_from_row(row)
        refusal = _reset_refusal(state) if action == AlarmAction.RESET else None
        if refusal is not None:
            refusals.append(AlarmRefusal(branch, state.condition, refusal))
            continue
        new = _apply(action, state, now=now, until=until, by=by)
        if new != state:
            changes.append(AlarmChange(branch, state.condition, state.state, new.state))
            stored.append(alarm_row(new, limit_m3s=row.get("limit_value"), now=now))
    if stored:
        store.upsert_alarms(stored)
    return AlarmActionResult(action, branch, tuple(changes), tuple(refusals))


def _apply(action: AlarmAction, state: AlarmState, *, now: datetime, until: datetime | None,
           by: str) -> AlarmState:
    if action == AlarmAction.ACKNOWLEDGE:
        new, _ = life.acknowledge(state, now, by)
    elif action == AlarmAction.SHELVE:
        assert until is not None
        new, _ = life.shelve(state, until, now=now, by=by)
    elif action == AlarmAction.UNSHELVE:
        new, _ = life.unshelve(state, now=now, by=by)
    elif action == AlarmAction.REMOVE_FROM_SERVICE:
        new, _ = life.remove_from_service(state, now=now, by=by)
    elif action == AlarmAction.RETURN_TO_SERVICE:
        new, _ = life.return_to_service(state, now=now, by=by)
    else:
        new, _ = life.reset(state, now, by)
    return new


def _reset_refusal(state: AlarmState) -> str | None:
    """Why *state* cannot be reset (None: it can, or there is nothing to reset)."""
    what = life.describe_condition(state.branch, state.condition)
    if state.active and state.state in (State.UNACK, State.ACK):
        return (f"{what} is still active ({state.state.value}): an alarm is reset only "
                "after its condition has returned to normal")
    if state.state == State.UNACK:
        return (f"{what} has returned to normal but is not acknowledged: acknowledge it "
                "first, then reset it")
    return None
