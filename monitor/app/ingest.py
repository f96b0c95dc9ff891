"""Readings in: the site's source opened, one ingest pass into the store, and the
readings of a span read from wherever the site's readings live.

An ingest can be run again and change nothing the second time: readings are upserted on
(tag, time), quarantine rows are not doubled. The daemon (`monitor.app.daemon`) calls it on
its interval, the CLI once (`ingest`).
"""

from __future__ import annotations

import logging
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any

import pandas as pd

from adapters.base import ReadingsSource, ResultsStore, source_class
from adapters.records import BatchWrite
from monitor.site.config import Site

log = logging.getLogger(__name__)

__all__ = [
    "IngestSummary",
    "ingest",
    "open_source",
    "read_tags",
    "read_window",
]


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
            settle_seconds=sec.settle_seconds, name=f"csv:{folder.name}",
        )
    return cls(
        site.tags.values(), url_env=sec.url_env, secrets_file=sec.secrets_file, table=sec.table,
        schema=sec.schema_name, layout="wide" if sec.layout == "wide" else "long",
        time_column=sec.time_column,
        tag_column=sec.tag_column, value_column=sec.value_column,
        quality_column=sec.quality_column, timezone=site.timezone, quality_map=quality,
        overlap=timedelta(seconds=sec.overlap), name=f"sql:{sec.table}",
    )


@dataclass(frozen=True)
class IngestSummary:
    """What one ingest pass did.

    ``stored`` counts readings new to the store and ``duplicates`` those it already had
    (a SQL source re-reads its overlap on every pass); ``quarantined`` and
    ``quarantine_reasons`` count quarantine rows new to the store in this pass, by the
    reason without its detail, at most `SUMMARY_REASONS` of them (the rest summed under
    "other reasons"), so that the summary stays one short line per reason.
    """

    read: int
    stored: int
    duplicates: int
    quarantined: int
    quarantine_reasons: dict[str, int]
    notes: dict[str, int]
    batches: int
    cursors: dict[str, dict[str, Any]] = field(default_factory=dict)
    #: stored readings this pass brought with another value, by what the site's
    #: ``[source] corrections`` policy did (refused ones met before are not counted)
    corrections_applied: int = 0
    corrections_refused: int = 0

    def to_json_dict(self) -> dict[str, Any]:
        return {
            "read": self.read,
            "stored": self.stored,
            "duplicates": self.duplicates,
            "corrections_applied": self.corrections_applied,
            "corrections_refused": self.corrections_refused,
            "quarantined": self.quarantined,
            "quarantine_reasons": self.quarantine_reasons,
            "notes": self.notes,
            "batches": self.batches,
            "cursors": self.cursors,
        }


#: Reasons listed one by one in an ingest summary; the rest are summed.
SUMMARY_REASONS = 10


def ingest(site: Site, store: ResultsStore, source: ReadingsSource) -> IngestSummary:
    """One pass: every batch the source has not delivered yet goes into the store.

    Each batch (readings, quarantine, cursor) is stored in one transaction, so a kill at
    any point loses nothing that was stored and the next pass resumes at the last stored
    cursor. Readings already stored are not doubled (upsert on tag and time), nor are
    quarantine rows; the summary counts what is new (see `IngestSummary`).
    """
    read = stored = n = applied = refused = 0
    notes: Counter[str] = Counter()
    started = datetime.now(UTC)
    policy = site.source.corrections if site.source is not None else "refuse"
    for batch in source.batches(store.cursors(source.name)):
        n += 1
        wrote = store.write_batch(batch, source=source.name, corrections=policy)
        read += len(batch.readings)
        stored += wrote.stored
        applied += wrote.applied
        refused += wrote.refused
        notes.update(batch.notes)
        log.debug("batch %s: %d readings, %d new", batch.cursor_key, len(batch.readings),
                  wrote.stored)
        _log_corrections(batch.cursor_key, wrote)
    reasons: Counter[str] = Counter()
    if n:
        for reason, count in store.quarantine_counts(source.name, since=started).items():
            reasons[_reason_kind(reason)] += count
    quarantined = sum(reasons.values())
    summary = IngestSummary(
        read=read,
        stored=stored,
        duplicates=read - stored,
        quarantined=quarantined,
        quarantine_reasons=_top_reasons(reasons),
        notes={k: v for k, v in notes.items() if k != "quarantined"},
        batches=n,
        cursors=store.cursors(source.name),
        corrections_applied=applied,
        corrections_refused=refused,
    )
    log.info(
        "ingest from %s: %d read, %d stored, %d duplicates, %d quarantined",
        source.name, read, stored, read - stored, quarantined,
    )
    return summary


def _log_corrections(origin: str, wrote: BatchWrite) -> None:
    """One line per batch that changed stored readings: the count and a first example."""
    if wrote.applied:
        log.warning("%s: %d stored readings corrected (e.g. %s); [source] corrections = "
                    "\"apply\": the new values replace them and their analysed windows are "
                    "fitted again at the next analysis", origin, wrote.applied, wrote.example)
    if wrote.refused:
        log.warning("%s: %d stored readings come with another value (e.g. %s); kept as first "
                    "stored and journalled ([source] corrections = \"refuse\"; \"apply\" "
                    "takes the new values)", origin, wrote.refused, wrote.example)


def _reason_kind(reason: str) -> str:
    """The reason without its detail: 'not a number: "abc"' → 'not a number'."""
    return reason.split(":", 1)[0].strip()


def _top_reasons(reasons: Counter[str]) -> dict[str, int]:
    """The `SUMMARY_REASONS` most frequent reasons, the rest summed as 'other reasons'.

    >>> _top_reasons(Counter({f"r{i}": i for i in range(1, 13)}))["other reasons (2 kinds)"]
    3
    """
    top = reasons.most_common(SUMMARY_REASONS)
    out = dict(top)
    rest = len(reasons) - len(top)
    if rest:
        out[f"other reasons ({rest} kinds)"] = sum(reasons.values()) - sum(out.values())
    return out


def read_tags(
    site: Site, store: ResultsStore, source: ReadingsSource, tags: list[str],
    start: datetime, end: datetime,
) -> pd.DataFrame:
    """Readings of *tags* in [start, end), from wherever the site's readings live."""
    if source.keeps_readings:
        return source.read(tags, start, end)
    return store.read_readings(tags, start, end)


def read_window(
    site: Site, store: ResultsStore, source: ReadingsSource, start: datetime, end: datetime
) -> pd.DataFrame:
    """Readings of every site tag in [start, end): from the source when it keeps its data
    (SQL), else from the store (ingested files)."""
    return read_tags(site, store, source, list(site.tags), start, end)
