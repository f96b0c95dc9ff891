"""Test helpers: run a source's batches as the store would, with cursors in a dict."""

from __future__ import annotations

import os
import time
from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from adapters.base import ReadingsSource
from adapters.records import Batch, empty_quarantine, empty_readings


@dataclass
class Ingested:
    """What one or more passes delivered."""

    readings: pd.DataFrame
    quarantined: pd.DataFrame
    notes: Counter[str] = field(default_factory=Counter)
    batches: int = 0


def store(batch: Batch, cursors: dict[str, dict[str, Any]]) -> None:
    """What the results store does with a batch's cursor: record it under its key."""
    cursors[batch.cursor_key] = dict(batch.cursor)


def ingest(
    source: ReadingsSource, cursors: dict[str, dict[str, Any]], *, limit: int | None = None
) -> Ingested:
    """Consume batches (at most *limit*), storing each cursor after its batch."""
    readings, quarantined = [empty_readings()], [empty_quarantine()]
    notes: Counter[str] = Counter()
    count = 0
    for batch in source.batches(cursors):
        readings.append(batch.readings)
        quarantined.append(batch.quarantined)
        notes.update(batch.notes)
        store(batch, cursors)
        count += 1
        if limit is not None and count >= limit:
            break
    return Ingested(
        pd.concat(readings, ignore_index=True),
        pd.concat(quarantined, ignore_index=True),
        notes,
        count,
    )


def settle(path: Path, age: float = 60.0) -> None:
    """Backdate a file's modification time so that the settle check passes."""
    then = time.time() - age
    os.utime(path, (then, then))


def canonical(frame: pd.DataFrame) -> pd.DataFrame:
    """Readings sorted by (time, tag) with a fresh index, for frame comparisons."""
    return frame.sort_values(["time", "tag"], kind="stable", ignore_index=True)


def write(path: Path, text: str | bytes, *, age: float = 60.0) -> Path:
    """Write a file (text as UTF-8, bytes as given) and make it look settled."""
    path.write_bytes(text.encode() if isinstance(text, str) else text)
    settle(path, age)
    return path


def reasons(frame: pd.DataFrame) -> Mapping[int, str]:
    """Quarantine reasons by line number."""
    return dict(zip(frame["line"].tolist(), frame["reason"].tolist(), strict=True))
