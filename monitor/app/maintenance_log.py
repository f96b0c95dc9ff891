"""The maintenance log as a person keeps it: work recorded, an entry corrected or withdrawn.

Each function writes the results store through `adapters.base.ResultsStore`
and returns a frozen record; the command line (``branchwatch log``) only prints them.
Work is logged once it is done: a time more than `FUTURE_SLACK` after now is refused
with `FutureWorkError` before the store is written. An entry that does not exist or was
already withdrawn is refused by the store (`ValueError`), an unknown branch with
`KeyError` naming the site's branches.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta

from adapters.base import ResultsStore
from monitor.app.operations import OperationError
from monitor.site.config import Site

__all__ = [
    "FUTURE_SLACK",
    "FutureWorkError",
    "MaintenanceCorrected",
    "MaintenanceRecorded",
    "MaintenanceWithdrawn",
    "correct_entry",
    "record_entry",
    "withdraw_entry",
]

#: How far after now a time of work may lie (the clocks of people and servers differ).
FUTURE_SLACK = timedelta(minutes=5)


class FutureWorkError(OperationError):
    """Work dated after now (beyond `FUTURE_SLACK`); ``when`` is that time (UTC)."""

    def __init__(self, when: datetime) -> None:
        super().__init__(f"{when.isoformat()} is in the future; log maintenance once it "
                         "is done")
        self.when = when


@dataclass(frozen=True)
class MaintenanceRecorded:
    """A new entry of the log: its id and what it says."""

    entry: int
    branch: str
    kind: str
    time: datetime


@dataclass(frozen=True)
class MaintenanceCorrected:
    """Entry ``entry`` withdrawn and replaced by its corrected copy ``replaced_by``."""

    entry: int
    replaced_by: int


@dataclass(frozen=True)
class MaintenanceWithdrawn:
    """Entry ``entry`` withdrawn: kept in the log, marked, no longer in force."""

    entry: int


def _not_future(when: datetime, now: datetime) -> None:
    if when > now + FUTURE_SLACK:
        raise FutureWorkError(when)


def record_entry(site: Site, store: ResultsStore, branch: str, kind: str, when: datetime,
                 *, note: str = "", now: datetime) -> MaintenanceRecorded:
    """Log work of *kind* done on *branch* at *when* (UTC)."""
    site.branch(branch)  # unknown names are refused with the list of branches
    _not_future(when, now)
    entry = store.add_maintenance(branch, kind, when, note)
    return MaintenanceRecorded(entry, branch, kind, when)


def correct_entry(store: ResultsStore, entry: int, *, time: datetime | None,
                  note: str | None, by: str, now: datetime) -> MaintenanceCorrected:
    """Withdraw *entry* and log its copy with the corrected *time* and/or *note*."""
    if time is not None:
        _not_future(time, now)
    new_id = store.correct_maintenance(entry, time=time, note=note, by=by)
    return MaintenanceCorrected(entry, new_id)


def withdraw_entry(store: ResultsStore, entry: int, *, by: str, note: str = ""
                   ) -> MaintenanceWithdrawn:
    """Withdraw *entry* (logged in error): *by* whom, and why (*note*)."""
    store.withdraw_maintenance(entry, by=by, note=note)
    return MaintenanceWithdrawn(entry)
