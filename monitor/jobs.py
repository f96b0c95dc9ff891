"""The daemon's jobs: one function each, pure apart from the store and source they are given.

Each job is a function of (site, store, source, time window) that can be run again with
the same arguments and change nothing the second time: readings are upserted on
(tag, time), fits on (branch, window), findings on (branch, kind, start). The daemon
(`monitor.daemon`) calls them on schedule; the CLI calls them once (`ingest`, `analyze`);
a backfill maps `analyze_windows` over branches and days.
"""

from __future__ import annotations

import logging
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import pandas as pd

from adapters.base import ReadingsSource, ResultsStore, source_class
from monitor.config import Site

log = logging.getLogger(__name__)

__all__ = [
    "IngestSummary",
    "ingest",
    "open_source",
    "windows",
]


# ---------------------------------------------------------------------------------------
# sources


def open_source(site: Site) -> ReadingsSource:
    """The readings source the site file names, with paths resolved beside the file."""
    if site.source is None:
        raise ValueError(f"{site.path}: the site file has no [source] section")
    sec = site.source
    # the concrete class is looked up by alias; its options are the section's keys
    cls: Callable[..., ReadingsSource] = source_class(sec.kind)
    quality = {code: True for code in sec.good_quality}
    if sec.kind == "csv":
        assert sec.path is not None
        folder = (site.path.parent / sec.path).resolve()
        return cls(
            site.tags.values(), path=folder, layout=sec.layout, delimiter=sec.delimiter,
            decimal=sec.decimal, timezone=site.timezone, quality_map=quality, pattern=sec.pattern,
            name=f"csv:{folder.name}",
        )
    return cls(
        site.tags.values(), url_env=sec.url_env, secrets_file=sec.secrets_file, table=sec.table,
        schema=sec.schema_name, layout="wide" if sec.layout == "wide" else "long",
        time_column=sec.time_column,
        tag_column=sec.tag_column, value_column=sec.value_column,
        quality_column=sec.quality_column, timezone=site.timezone, quality_map=quality,
        name=f"sql:{sec.table}",
    )


# ---------------------------------------------------------------------------------------
# ingest


@dataclass(frozen=True)
class IngestSummary:
    """What one ingest pass did."""

    read: int
    stored: int
    duplicates: int
    quarantined: int
    quarantine_reasons: dict[str, int]
    notes: dict[str, int]
    batches: int
    cursors: dict[str, dict[str, Any]] = field(default_factory=dict)

    def to_json_dict(self) -> dict[str, Any]:
        return {
            "read": self.read,
            "stored": self.stored,
            "duplicates": self.duplicates,
            "quarantined": self.quarantined,
            "quarantine_reasons": self.quarantine_reasons,
            "notes": self.notes,
            "batches": self.batches,
            "cursors": self.cursors,
        }


def ingest(site: Site, store: ResultsStore, source: ReadingsSource) -> IngestSummary:
    """One pass: every batch the source has not delivered yet goes into the store.

    Each batch (readings, quarantine, cursor) is stored in one transaction, so a kill at
    any point loses nothing that was stored and the next pass resumes at the last stored
    cursor. Readings already stored are not doubled (upsert on tag and time).
    """
    read = stored = quarantined = n = 0
    reasons: Counter[str] = Counter()
    notes: Counter[str] = Counter()
    for batch in source.batches(store.cursors(source.name)):
        n += 1
        new = store.store_batch(batch, source=source.name)
        read += len(batch.readings)
        stored += new
        quarantined += len(batch.quarantined)
        if len(batch.quarantined):
            reasons.update(batch.quarantined["reason"].astype(str).map(_reason_kind))
        notes.update(batch.notes)
        log.debug("batch %s: %d readings, %d new", batch.cursor_key, len(batch.readings), new)
    summary = IngestSummary(
        read=read,
        stored=stored,
        duplicates=read - stored,
        quarantined=quarantined,
        quarantine_reasons=dict(reasons),
        notes={k: v for k, v in notes.items() if k != "quarantined"},
        batches=n,
        cursors=store.cursors(source.name),
    )
    log.info(
        "ingest from %s: %d read, %d stored, %d duplicates, %d quarantined",
        source.name, read, stored, read - stored, quarantined,
    )
    return summary


def _reason_kind(reason: str) -> str:
    """The reason without its detail: 'not a number: "abc"' → 'not a number'."""
    return reason.split(":", 1)[0].strip()


# ---------------------------------------------------------------------------------------
# windows


def windows(
    start: datetime, end: datetime, size: timedelta, timezone: str
) -> Iterator[tuple[datetime, datetime]]:
    """Analysis windows covering [start, end), as UTC pairs.

    Windows of whole days are aligned to the site's local midnight (a DST day is 23 or
    25 hours long, as the plant lived it); shorter windows are aligned to UTC multiples of
    their size. Only whole windows are returned.

    >>> ws = list(windows(datetime(2026, 3, 28, tzinfo=UTC), datetime(2026, 3, 31, tzinfo=UTC),
    ...                   timedelta(days=1), "Europe/Berlin"))
    >>> [(a.isoformat(), (b - a).total_seconds() / 3600) for a, b in ws]
    [('2026-03-28T23:00:00+00:00', 23.0), ('2026-03-29T22:00:00+00:00', 24.0)]
    """
    if start.tzinfo is None or end.tzinfo is None:
        raise ValueError("windows() needs timezone-aware start and end")
    seconds = size.total_seconds()
    if seconds <= 0:
        raise ValueError(f"window size must be positive; got {size}")
    if seconds % 86_400 == 0:
        zone = ZoneInfo(timezone)
        days = int(seconds // 86_400)
        local = start.astimezone(zone)
        day = local.date() if local.time() == datetime.min.time() else local.date() + timedelta(1)
        while True:
            a = datetime.combine(day, datetime.min.time(), zone).astimezone(UTC)
            b = datetime.combine(day + timedelta(days), datetime.min.time(), zone).astimezone(UTC)
            if b > end:
                return
            yield a, b
            day += timedelta(days)
    else:
        t0 = pd.Timestamp(start).ceil(pd.Timedelta(seconds=seconds)).to_pydatetime()
        while t0 + size <= end:
            yield t0, t0 + size
            t0 += size
