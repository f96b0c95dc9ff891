"""The records and vocabularies that cross the interfaces of `adapters.base`.

Plain types, no access to data or people: the readings and quarantine frames
(`READING_COLUMNS`, `QUARANTINE_COLUMNS`, `empty_readings`, `empty_quarantine`), a
historian tag as the site config describes it (`TagSpec`), a piece of new data from a
source and what storing it did (`Batch`, `BatchWrite`), when a stored reading counts as
corrected (`CORRECTION_POLICIES`, `values_differ`), one notification (`Message`), and
the stored spellings of alarm states and maintenance kinds (`AlarmStateName`,
`MaintenanceKind`).

Readings frame
--------------
Every source delivers readings as a pandas frame with exactly the columns of
`READING_COLUMNS`:

=========  ===========================  ==========================================
column     dtype                        meaning
=========  ===========================  ==========================================
time       datetime64[ns, UTC]          sample time, UTC
tag        str (object)                 the historian tag, e.g. ``"FT-203"``
value      float64                      value in SI (see `adapters.units`)
good       bool                         quality after the site's quality-code map
=========  ===========================  ==========================================
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import numpy as np
import pandas as pd

__all__ = [
    "ALARM_STATES",
    "CORRECTION_ATOL",
    "CORRECTION_POLICIES",
    "CORRECTION_RTOL",
    "MAINTENANCE_KINDS",
    "QUARANTINE_COLUMNS",
    "READING_COLUMNS",
    "AlarmStateName",
    "Batch",
    "BatchWrite",
    "MaintenanceKind",
    "Message",
    "TagSpec",
    "empty_quarantine",
    "empty_readings",
    "values_differ",
]

READING_COLUMNS: tuple[str, ...] = ("time", "tag", "value", "good")
#: Rows that could not be read: where they were, why, and the raw text (truncated).
QUARANTINE_COLUMNS: tuple[str, ...] = ("origin", "line", "reason", "raw")


class AlarmStateName(StrEnum):
    """The ISA-18.2 alarm states, as `monitor.app.alarms` runs the life cycle (there: `State`)
    and the results store keeps them (its ``alarms.state`` column and journal)."""

    NORMAL = "normal"
    UNACK = "unack"  # active, unacknowledged
    ACK = "ack"  # active, acknowledged
    RTN_UNACK = "rtn_unack"  # returned to normal, unacknowledged
    SHELVED = "shelved"
    OUT_OF_SERVICE = "out_of_service"


#: The stored spelling of every alarm state.
ALARM_STATES: tuple[str, ...] = tuple(s.value for s in AlarmStateName)


class MaintenanceKind(StrEnum):
    """The work a maintenance entry records (``cleaned`` resets the fouling baseline;
    ``other`` is any other work after which the diagnosis starts a new baseline)."""

    CLEANED = "cleaned"
    VALVE_SET = "valve_set"
    METER_CALIBRATED = "meter_calibrated"
    REPAIRED = "repaired"
    INSPECTED = "inspected"
    OTHER = "other"


#: The stored spelling of every maintenance kind.
MAINTENANCE_KINDS: tuple[str, ...] = tuple(k.value for k in MaintenanceKind)


def empty_readings() -> pd.DataFrame:
    """A readings frame with no rows and the right dtypes."""
    return pd.DataFrame(
        {
            "time": pd.Series([], dtype="datetime64[ns, UTC]"),
            "tag": pd.Series([], dtype=object),
            "value": pd.Series([], dtype="float64"),
            "good": pd.Series([], dtype=bool),
        }
    )


def empty_quarantine() -> pd.DataFrame:
    """A quarantine frame with no rows."""
    return pd.DataFrame(
        {
            "origin": pd.Series([], dtype=object),
            "line": pd.Series([], dtype="int64"),
            "reason": pd.Series([], dtype=object),
            "raw": pd.Series([], dtype=object),
        }
    )


@dataclass(frozen=True)
class TagSpec:
    """One historian tag as the site config describes it.

    ``unit`` is the plant unit the source reports (``"bar"``, ``"m3/h"``); ``kind`` the
    quantity kind (a key of `adapters.units.SI_UNITS`) that fixes the SI unit inside.
    ``low``/``high`` are the instrument range in SI, when configured.
    """

    tag: str
    unit: str
    kind: str
    low: float | None = None
    high: float | None = None


@dataclass(frozen=True)
class Batch:
    """A piece of new data from a source, to be stored in one transaction.

    ``cursor_key``/``cursor`` say how far the source has delivered once this batch is
    stored (for a CSV file: its path and the byte offset and hash read so far; for a SQL
    table: its time watermark). The store writes readings, quarantine and cursor together,
    so a killed ingest resumes exactly where the last stored batch ended.
    """

    readings: pd.DataFrame
    quarantined: pd.DataFrame
    cursor_key: str
    cursor: Mapping[str, Any]
    #: counts of what the source passed over, e.g. {"duplicate_rows": 3}
    notes: Mapping[str, int] = field(default_factory=dict)


#: What the site's ``[source] corrections`` may say about a stored reading that a later
#: export brings with another value: keep the first stored value, or take the latest.
CORRECTION_POLICIES: tuple[str, ...] = ("refuse", "apply")
#: A value counts as changed beyond this relative and absolute difference (SI): a float
#: written to text and read back (or converted bar → Pa and back) is not a correction.
CORRECTION_RTOL = 1e-6
CORRECTION_ATOL = 1e-9


def values_differ(old: Any, new: Any) -> Any:
    """Element-wise: is *new* a different value from *old* (arrays of SI floats)?

    Beyond ``CORRECTION_ATOL + CORRECTION_RTOL * max(|old|, |new|)``; NaN (no value)
    equals NaN and differs from any number.

    >>> values_differ(np.array([1e5, 1e5, np.nan, np.nan]),
    ...               np.array([1e5 * (1 + 1e-9), 1.001e5, np.nan, 0.0])).tolist()
    [False, True, False, True]
    """
    old = np.asarray(old, dtype="float64")
    new = np.asarray(new, dtype="float64")
    with np.errstate(invalid="ignore", over="ignore"):
        close = np.abs(new - old) <= CORRECTION_ATOL + CORRECTION_RTOL * np.maximum(
            np.abs(old), np.abs(new))
    return ~(close | (np.isnan(old) & np.isnan(new)))


@dataclass(frozen=True)
class BatchWrite:
    """What storing one batch did: readings newly stored, corrections applied and
    corrections refused (newly journalled; one met again is not counted), and the first
    correction as an example for the log (None when there was none)."""

    stored: int
    applied: int = 0
    refused: int = 0
    example: str | None = None


@dataclass(frozen=True)
class Message:
    """One notification.

    ``key`` is its idempotency key: the outbox sends each key once per channel. ``kind``
    is ``alarm``, ``digest`` or ``test``; ``priority`` ``high``, ``medium`` or ``low``;
    ``text`` the plain-text body; ``html`` an HTML attachment (the morning report) named
    ``attachment_name``; ``data`` extra fields for a webhook's JSON.
    """

    key: str
    subject: str
    text: str
    kind: str = "alarm"
    priority: str = "medium"
    html: str | None = None
    attachment_name: str = "report.html"
    data: Mapping[str, Any] = field(default_factory=dict)
