"""The small interfaces between branchwatch and the outside world.

``monitor/`` talks to data and people only through these families:

* `ReadingsSource` — where historian readings come from (a folder of CSV exports, a SQL
  table). Implementations: ``csv`` (`adapters.csv_source`), ``sql``
  (`adapters.sql_source`).
* `ResultsStore` — where everything branchwatch learns is kept (ingested readings of file
  sources, fits, findings, alarms, maintenance events, cursors, quarantine, job runs).
  Implementation: ``sqlalchemy`` (`adapters.store`).
* `Notifier` — how a `Message` reaches people. Implementations: ``email`` and
  ``webhook`` (`adapters.notify`).

Each implementation registers under a short alias that the site config names
(``[source] kind = "csv"``); `source_class` and friends look the alias up.

The records these interfaces exchange (the readings frame, `TagSpec`, `Batch`,
`BatchWrite`, `Message`) and the vocabularies they share (alarm states, maintenance
kinds, correction policies) are plain types in `adapters.records`.

Exceptions
----------
::

    BranchwatchAdapterError (Exception)
    ├── SourceUnavailable (ConnectionError)   the source cannot be reached now; retry later
    ├── UnknownTagError (KeyError)            a configured tag the source does not have
    ├── StoreError (RuntimeError)             the results store refused a write or read
    ├── NotifyError (ConnectionError)         a message could not go now; try again later
    └── NotifyRejected (ValueError)           a message can never go as it is (login or
                                              recipient refused): do not retry
"""

from __future__ import annotations

import abc
import importlib
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import Any, ClassVar

import pandas as pd

from adapters.fit_record import WindowFit
from adapters.records import Batch, BatchWrite, Message, TagSpec

__all__ = [
    "BranchwatchAdapterError",
    "Notifier",
    "NotifyError",
    "NotifyRejected",
    "ReadingsSource",
    "ResultsStore",
    "SourceUnavailable",
    "StoreError",
    "UnknownTagError",
    "notifier_class",
    "open_store",
    "source_class",
]


class BranchwatchAdapterError(Exception):
    """Base of every error raised by an adapter."""


class SourceUnavailable(BranchwatchAdapterError, ConnectionError):
    """The readings source cannot be reached now (database down, folder missing)."""


class UnknownTagError(BranchwatchAdapterError, KeyError):
    """A configured tag that the source does not have."""

    def __init__(self, tag: str, source: str) -> None:
        super().__init__(tag, source)
        self.tag = tag
        self.source = source

    def __str__(self) -> str:
        return f"tag {self.tag!r} is not in source {self.source!r}"


class StoreError(BranchwatchAdapterError, RuntimeError):
    """The results store refused a read or a write."""


class NotifyError(BranchwatchAdapterError, ConnectionError):
    """A message could not be delivered now (server down, timeout, dropped): retry later."""


class NotifyRejected(BranchwatchAdapterError, ValueError):
    """A message can never be delivered as it is (login, sender or recipient refused)."""


class ReadingsSource(abc.ABC):
    """Where historian readings come from.

    Two ways to get data out:

    * `batches` — incremental: everything not yet delivered according to the stored
      cursors. File sources are ingested this way into the results store.
    * `read` — a window of readings, for sources that keep their data themselves (SQL).
      Sources whose data lives only in the store after ingest set
      ``keeps_readings = False`` and analysis reads the store instead.
    """

    alias: ClassVar[str] = ""
    #: True when `read` can serve any window (the data stays at the source).
    keeps_readings: ClassVar[bool] = False
    _registry: ClassVar[dict[str, type[ReadingsSource]]] = {}

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        if cls.alias:
            ReadingsSource._registry[cls.alias] = cls

    def __init__(self, tags: Iterable[TagSpec], *, name: str = "") -> None:
        self.tags: dict[str, TagSpec] = {t.tag: t for t in tags}
        self.name = name or self.alias

    @abc.abstractmethod
    def batches(self, cursors: Mapping[str, Mapping[str, Any]]) -> Iterator[Batch]:
        """Yield the data not yet delivered, given the cursors stored so far."""

    def read(self, tags: Iterable[str], start: datetime, end: datetime) -> pd.DataFrame:
        """Readings of *tags* with ``start <= time < end`` (UTC), as a readings frame."""
        raise NotImplementedError(
            f"source {self.name!r} does not keep readings; read them from the store"
        )

    def check(self) -> list[str]:
        """Reach the source; return a list of problems (empty when all is well)."""
        return []

    def close(self) -> None:  # noqa: B027 - optional hook
        """Release connections and files."""


class ResultsStore(abc.ABC):
    """Where branchwatch keeps what it ingests and what it learns.

    Implementations must make each public write one transaction, and writes keyed on
    natural keys (tag+time, branch+window, …) idempotent: writing the same thing twice
    leaves one copy. Times in and out are aware UTC (frames: ``datetime64[ns, UTC]``);
    naive times are refused with `ValueError`. Reads return pandas frames; missing
    numbers are NaN. Implementations register under ``alias``; `ResultsStore.by_alias`
    finds them (``sqlalchemy`` → `adapters.store.SqlStore`).
    """

    alias: ClassVar[str] = ""
    _registry: ClassVar[dict[str, type[ResultsStore]]] = {}
    #: Where each alias lives; imported on first use (a driver may be optional).
    _modules: ClassVar[dict[str, str]] = {"sqlalchemy": "adapters.store"}

    @property
    def shared(self) -> bool:
        """Whether processes on other machines can open this store as well (a database
        server), as a backfill on a cluster needs; a file or in-memory database cannot be
        shared. False unless an implementation says otherwise."""
        return False

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        if cls.alias:
            ResultsStore._registry[cls.alias] = cls

    @staticmethod
    def by_alias(alias: str) -> type[ResultsStore]:
        """The `ResultsStore` implementation registered under *alias*."""
        if alias not in ResultsStore._registry and alias in ResultsStore._modules:
            importlib.import_module(ResultsStore._modules[alias])
        try:
            return ResultsStore._registry[alias]
        except KeyError:
            known = ", ".join(sorted(ResultsStore._modules))
            raise KeyError(f"unknown store kind {alias!r}; known: {known}") from None

    @dataclass(frozen=True)
    class Watermarks:
        """How far everything has got, for the ``status`` command.

        ``readings``: tag, last (newest stored reading time) · ``cursors``: source, key,
        updated · ``fits``: branch, last_window_end · ``jobs``: job, last_started,
        status (of that last run).
        """

        readings: pd.DataFrame
        cursors: pd.DataFrame
        fits: pd.DataFrame
        jobs: pd.DataFrame

    # readings and ingest bookkeeping -------------------------------------------------
    def store_batch(self, batch: Batch, *, source: str) -> int:
        """Store a batch's readings, quarantine rows and cursor in one transaction.

        Returns the number of readings newly stored (duplicates of stored readings are
        not counted). A stored reading the batch brings with another value is kept and
        journalled as refused (`write_batch` with ``corrections="refuse"``).
        """
        return self.write_batch(batch, source=source).stored

    @abc.abstractmethod
    def write_batch(
        self, batch: Batch, *, source: str, corrections: str = "refuse"
    ) -> BatchWrite:
        """`store_batch` under a corrections policy (one of `CORRECTION_POLICIES`).

        A reading already stored whose value (beyond `values_differ`'s tolerance) or
        quality the batch changes is a correction: ``"refuse"`` keeps the stored reading,
        ``"apply"`` replaces it; either way it is journalled (`read_corrections`), a
        refused one once however often it comes again. All in the batch's transaction.
        """

    @abc.abstractmethod
    def read_corrections(
        self, *, action: str | None = None, pending: bool = False,
        start: datetime | None = None, end: datetime | None = None,
    ) -> pd.DataFrame:
        """The corrections journal (id, tag, time, old_value, new_value, old_good,
        new_good, source, origin, line, recorded_at, action, reanalysed_at), by time;
        *pending*: applied ones not yet re-analysed; *start*/*end*: reading times in
        ``[start, end)``."""

    @abc.abstractmethod
    def mark_reanalysed(self, ids: Iterable[int], *, when: datetime | None = None) -> int:
        """Mark applied corrections as re-analysed (at *when*, default now); returns how
        many were marked."""

    @abc.abstractmethod
    def correction_counts(self) -> dict[str, int]:
        """Journalled corrections: ``applied``, ``refused`` and ``pending`` (applied, not
        yet re-analysed)."""

    @abc.abstractmethod
    def cursors(self, source: str) -> dict[str, dict[str, Any]]:
        """The stored cursors of *source* (cursor key → cursor)."""

    @abc.abstractmethod
    def read_readings(self, tags: Iterable[str], start: datetime, end: datetime) -> pd.DataFrame:
        """Stored readings of *tags* with ``start <= time < end``, as a readings frame."""

    @abc.abstractmethod
    def quarantine_counts(
        self, source: str | None = None, since: datetime | None = None
    ) -> dict[str, int]:
        """Quarantined rows by reason (of one *source* or all, stored at or after *since*)."""

    # fits and findings ---------------------------------------------------------------
    @abc.abstractmethod
    def upsert_fits(self, fits: Iterable[WindowFit]) -> int:
        """Store fit results keyed on (branch, window_start, window_end), replacing any."""

    @abc.abstractmethod
    def newest_fit_end(self) -> datetime | None:
        """The end of the newest analysed window of any branch (UTC), None when none."""

    @abc.abstractmethod
    def read_fits(
        self,
        branch: str | None = None,
        start: datetime | None = None,
        end: datetime | None = None,
    ) -> pd.DataFrame:
        """Fits (of one branch) whose window starts in ``[start, end)``, oldest first."""

    @abc.abstractmethod
    def store_window(
        self,
        *,
        fits: Iterable[WindowFit],
        screening: pd.DataFrame,
        balance: Mapping[str, Any] | None,
        health: pd.DataFrame,
    ) -> None:
        """Everything one analysis window produced (fits, screening counts per tag, the
        header balance, data health), in one transaction."""

    @abc.abstractmethod
    def read_screening(
        self, start: datetime | None = None, end: datetime | None = None
    ) -> pd.DataFrame:
        """Screening counts per window and tag (see `store_window`)."""

    @abc.abstractmethod
    def read_balance(
        self, start: datetime | None = None, end: datetime | None = None
    ) -> pd.DataFrame:
        """Header mass balance per window (see `store_window`)."""

    @abc.abstractmethod
    def upsert_findings(self, rows: Iterable[Mapping[str, Any]]) -> int:
        """Store findings keyed on (branch, kind, start), replacing any."""

    @abc.abstractmethod
    def read_findings(
        self,
        branch: str | None = None,
        *,
        kind: str | None = None,
        since: datetime | None = None,
        open_only: bool = False,
    ) -> pd.DataFrame:
        """Findings, filtered; columns as in the findings file (DESIGN §5) plus ``updated``."""

    # alarms ---------------------------------------------------------------------------
    @abc.abstractmethod
    def upsert_alarms(self, rows: Iterable[Mapping[str, Any]]) -> int:
        """Write alarm states keyed on (branch, condition); state changes are journalled."""

    @abc.abstractmethod
    def read_alarms(self, branch: str | None = None, *, active_only: bool = False) -> pd.DataFrame:
        """Alarms and their ISA-18.2 states."""

    @abc.abstractmethod
    def alarm_events(
        self, branch: str | None = None, since: datetime | None = None
    ) -> pd.DataFrame:
        """The alarm journal: every state change, oldest first."""

    # maintenance, job runs, data health, status ----------------------------------------
    @abc.abstractmethod
    def add_maintenance(
        self, branch: str, kind: str, time: datetime, note: str = "", *,
        now: datetime | None = None,
    ) -> int:  # fmt: skip
        """Log a maintenance entry, returning its id (idempotent on branch, kind, time while
        the entry is in force); work dated after *now* is refused."""

    @abc.abstractmethod
    def withdraw_maintenance(
        self, entry_id: int, *, by: str, note: str = "", now: datetime | None = None
    ) -> None:
        """Withdraw an entry: kept and marked (who, when, why), no longer in force."""

    @abc.abstractmethod
    def correct_maintenance(
        self, entry_id: int, *, time: datetime | None = None, note: str | None = None,
        by: str, now: datetime | None = None,
    ) -> int:  # fmt: skip
        """Withdraw an entry and log its corrected copy (``replaces`` = the old id)."""

    @abc.abstractmethod
    def maintenance(
        self, branch: str | None = None, *, include_withdrawn: bool = False
    ) -> pd.DataFrame:
        """Maintenance entries in force (id, branch, kind, time, note, …), oldest first."""

    @abc.abstractmethod
    def record_job_run(
        self,
        job: str,
        started: datetime,
        finished: datetime | None,
        status: str,
        detail: Mapping[str, Any] | None = None,
    ) -> None:
        """Record a job run (idempotent on job, started: a later call updates it)."""

    @abc.abstractmethod
    def job_runs(self, limit: int = 20, job: str | None = None) -> pd.DataFrame:
        """The newest job runs, newest first."""

    @abc.abstractmethod
    def add_data_health(self, frame: pd.DataFrame) -> int:
        """Store screening counts (tag, day, flag, count), replacing stored days."""

    @abc.abstractmethod
    def data_health(self, start: datetime, end: datetime) -> pd.DataFrame:
        """Screening counts (tag, day, flag, count) of UTC days in ``[start, end)``."""

    @abc.abstractmethod
    def watermarks(self) -> ResultsStore.Watermarks:
        """How far readings, cursors, fits and jobs have got."""

    # the notification outbox -----------------------------------------------------------
    @abc.abstractmethod
    def queue_messages(self, rows: Iterable[Mapping[str, Any]]) -> int:
        """Queue messages (keys ``key``, ``channel``, ``kind``, ``priority``, ``subject``,
        ``body`` (text), ``created``); a (key, channel) already queued is left as it is.
        Returns how many were new."""

    @abc.abstractmethod
    def outbox(
        self, *, status: str | None = None, due_before: datetime | None = None,
        limit: int | None = None,
    ) -> pd.DataFrame:
        """Outbox rows, oldest first; *due_before*: pending ones whose next try is due."""

    @abc.abstractmethod
    def update_message(self, key: str, channel: str, **fields: Any) -> None:
        """Set *fields* (status, attempts, next_try, sent_at, last_error) of one message."""

    @abc.abstractmethod
    def close(self) -> None:
        """Release the connection pool."""


class Notifier(abc.ABC):
    """A way of telling people: `send` delivers one `Message` or raises.

    `send` raises `NotifyError` when trying again later may work and `NotifyRejected`
    when it cannot; it must not block longer than its timeout. Implementations register
    under ``alias``; `notifier_class` finds them.
    """

    alias: ClassVar[str] = ""
    _registry: ClassVar[dict[str, type[Notifier]]] = {}

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        if cls.alias:
            Notifier._registry[cls.alias] = cls

    def __init__(self, *, name: str = "") -> None:
        self.name = name or self.alias

    @abc.abstractmethod
    def send(self, message: Message) -> None:
        """Deliver *message* once, or raise `NotifyError` / `NotifyRejected`."""

    def describe(self) -> str:
        """Where messages go, with no secret in it (for logs and ``status``)."""
        return self.name


#: Where each alias lives; the module is imported on first use, so that an optional
#: dependency (a database driver) is only needed by the sites that use it.
_MODULES: dict[str, dict[str, str]] = {
    "source": {"csv": "adapters.csv_source", "sql": "adapters.sql_source"},
    "notifier": {"email": "adapters.notify", "webhook": "adapters.notify"},
}


def _lookup(registry: Mapping[str, type[Any]], alias: str, family: str) -> type[Any]:
    if alias not in registry and alias in _MODULES[family]:
        module = _MODULES[family][alias]
        try:
            importlib.import_module(module)
        except ImportError as exc:
            raise ImportError(
                f"the {alias} {family} needs a package that is not installed ({exc.name}): "
                f"pip install 'branchwatch[{alias}]' or the driver named in the README"
            ) from exc
    try:
        return registry[alias]
    except KeyError:
        known = ", ".join(sorted(_MODULES[family])) or "none"
        raise KeyError(f"unknown {family} kind {alias!r}; known: {known}") from None


def source_class(alias: str) -> type[ReadingsSource]:
    """The `ReadingsSource` implementation registered under *alias*."""
    return _lookup(ReadingsSource._registry, alias, "source")


def notifier_class(alias: str) -> type[Notifier]:
    """The `Notifier` implementation registered under *alias*."""
    return _lookup(Notifier._registry, alias, "notifier")


def open_store(url: str, *, alias: str = "sqlalchemy", schema: str | None = None
               ) -> ResultsStore:
    """Open the results store at *url* (creating or upgrading its tables), in *schema*
    of the database where one is given (a fleet's shared store: one schema per site)."""
    cls: Any = ResultsStore.by_alias(alias)
    store: ResultsStore = cls(url) if schema is None else cls(url, schema=schema)
    return store
