"""Readings from a folder of CSV exports (alias ``csv``).

A historian job drops exports into a folder; `CsvSource.batches` reads what is new.

Layouts (chosen by ``layout``, or detected from the header line when ``"auto"``):

* **wide** — ``timestamp,<tag>,<tag>,…``: one row per instant, one column per tag. An
  empty cell means "not sampled" and yields no reading. Columns of tags the config does
  not know are skipped and reported once per file.
* **long** — ``timestamp,tag,value[,quality]``: one row per reading. Detected when the
  header names a ``tag`` and a ``value`` column.

Timestamps are ISO-8601. With an offset or ``Z`` they are exact. Without, they are wall
clock time in the site zone (``timezone``) and daylight-saving changes follow this rule:

* **missing hour** (spring forward): a wall time that does not exist is quarantined with
  reason ``nonexistent local time``; it is never shifted.
* **repeated hour** (fall back): for each tag, in file order, wall times inside the
  repeated hour are read as daylight time (the first pass of the clock) until the wall
  clock steps back inside that hour; from the step back on they are standard time (the
  second pass). A file that holds only one copy of the repeated hour is therefore read
  as daylight time: exports that drop a copy must carry offsets. The state of this rule
  is kept in the cursor, so a file read in several chunks is resolved the same way.

Ledger: the cursor of a file (key: its path relative to the folder) holds the bytes and
lines consumed, the SHA-256 of those bytes, and, once the file has been read to its end,
``complete_sha256``. Hence: the same file twice yields nothing new; a file that grew is
read from where it stopped (whole lines only: an unterminated last line waits for its
newline); a file whose consumed part changed is read again from the start and counted as
``file_changed``; a new file whose bytes equal a completely read one is counted as
``duplicate_file`` and not read. A file refused for its header (``bad_header``: it
does not split into columns with the configured delimiter) or quarantined as a file is
recorded with the parse settings it was refused under (delimiter, decimal mark, layout,
tags) and read again from the start once those settings change — after the user sets
the right delimiter, say. Files whose modification time is younger than
``settle_seconds`` are still being written and are skipped (``files_unsettled``).

A line longer than 1 MiB (`MAX_LINE_BYTES`) is no record of an export: it is quarantined
(reason ``line longer than …``, note ``long_lines``) and reading goes on after it. A
file that cannot be read at all never stops a scan either: a binary file (NUL bytes, a
header that is not UTF-8 text, UTF-16 text), a header line over 1 MiB or an over-long
line that never ends, a file that cannot be opened (permission denied) or vanishes while
read, or any other error of the parse is *quarantined as a file*: one quarantine row (line 0,
or the line where it happened) with the reason, a note ``files_quarantined``, and a
ledger entry (``quarantined``: the reason, with the file's size, modification and
status-change times) so that it is not tried again on every ingest. A file that changes
(size, content, or mode: a ``chmod`` that makes it readable) is looked at again, from
where its readable part ended. Readings of
the file stored before the error stay stored; the other files are read as usual.

Symbolic links are never followed, neither links to files nor links to folders: the
inbox takes the files dropped into it, not what a link points to. A link is noted once
(``symlinks_skipped``) with a quarantine row naming the link, never its target's
content. *pattern* must stay inside the folder (no ``..`` part, not absolute).

Bad input never stops a scan: each bad row (or, in the wide layout, each bad cell) goes
to the batch's quarantine frame with file, line, reason and raw text; blank lines are
counted (``blank_lines``); duplicate (time, tag) pairs keep the last row
(``duplicate_rows``); rows of unknown tags in the long layout are counted
(``unknown_tag_rows``) and quarantined once per tag and chunk with the count in the
reason (more than `GROUP_AT` unknown tags in a chunk: one row for all, naming the first
few). Columns of unknown tags in the wide layout give one quarantine row per file
("9,999 columns are not configured tags: A1, A2, A3 … (9,996 more)"). Cells that spell
NaN or infinity are not readings: they are quarantined once per tag and chunk with
reason ``value is NaN/inf`` and the cell count, and counted (``nonfinite_values``).
Large files stream in chunks of about ``chunk_rows`` readings, one `Batch` each.

>>> CsvSource([TagSpec("FT-1", "m3/h", "flow")], path=".").name
'csv'
"""

from __future__ import annotations

import csv
import hashlib
import io
import logging
import time
from collections import Counter
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import numpy.typing as npt
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv

from adapters.base import (
    Batch,
    ReadingsSource,
    SourceUnavailable,
    TagSpec,
    empty_quarantine,
    empty_readings,
)
from adapters.source_tools import (
    DEFAULT_QUALITY_MAP,
    NULL_TOKENS,
    RAW_MAX,
    TIME_REASONS,
    arrow_text,
    encode_text,
    name_list,
    nonfinite_groups,
    parse_times,
    pattern_problem,
    quality_good,
    quarantine_frame,
    readings_frame,
    si_scale_offset,
    to_float,
)

__all__ = ["GROUP_AT", "MAX_LINE_BYTES", "CsvSource"]

log = logging.getLogger(__name__)

#: A line longer than this [bytes] is not a CSV record of a historian export; the same
#: as Arrow's default block size, so a line up to this length is still parsed fast.
MAX_LINE_BYTES = 1 << 20
#: Upper bound of one read [bytes], whatever ``chunk_rows`` and the line length suggest.
_MAX_CHUNK_BYTES = 16 << 20
#: Bytes looked at to tell a text CSV from a binary file.
_SNIFF_BYTES = 1 << 16
#: More unknown tags than this in one chunk give one grouped quarantine row.
GROUP_AT = 10
_LONG_LINE = f"line longer than {MAX_LINE_BYTES:,} bytes: not a CSV record"
_SYMLINK_REASON = "symbolic link: not followed (the inbox reads real files only)"

_TIME_NAMES = ("timestamp", "time", "datetime", "date_time", "ts")
_TAG_NAMES = ("tag", "tagname", "tag_name", "point", "name")
_VALUE_NAMES = ("value", "val", "reading")
_QUALITY_NAMES = ("quality", "q", "status")


# --------------------------------------------------------------------------- layout
@dataclass(frozen=True)
class _Layout:
    """What the header line of one file says."""

    kind: str  # "wide" | "long"
    n_fields: int
    time_col: int
    tag_cols: tuple[tuple[int, str], ...]  # wide: (column, tag) of known tags
    unknown: tuple[str, ...]  # wide: header names the config does not know
    tag_col: int = -1  # long
    value_col: int = -1
    quality_col: int = -1


def _find(names: Sequence[str], wanted: Sequence[str]) -> int:
    low = [n.strip().lower() for n in names]
    return next((low.index(w) for w in wanted if w in low), -1)


@dataclass
class _Chunk:
    """Parsed columns of one chunk; ``lines`` are file line numbers per row."""

    lines: npt.NDArray[np.int64]
    cols: dict[int, npt.NDArray[Any]]  # column index → float or text array
    bad_rows: list[tuple[int, str, str]]  # (line, reason, raw) found while splitting
    blank: int
    #: float columns: cells that held NaN or infinity (the float array has NaN there)
    nonfinite: dict[int, npt.NDArray[np.bool_]] = field(default_factory=dict)


class _Unreadable(Exception):
    """A file that cannot be read as a CSV export: the reason, where, and a raw sample."""

    def __init__(self, reason: str, line: int = 0, raw: str = "") -> None:
        super().__init__(reason)
        self.reason, self.line, self.raw = reason, line, raw


class CsvSource(ReadingsSource):
    """Folder of CSV exports; see the module docstring for layouts, rules and ledger.

    *timezone* is the site zone of naive timestamps; *quality_map* maps quality codes
    (case-insensitive) to good/bad (default `DEFAULT_QUALITY_MAP`; unmapped codes are
    bad); *settle_seconds* [s] is how long a file must stay unmodified before it is read;
    *chunk_rows* is the number of readings per batch, about.
    """

    alias = "csv"
    keeps_readings = False

    def __init__(
        self,
        tags: Iterable[TagSpec],
        *,
        path: str | Path,
        layout: str = "auto",
        delimiter: str = ",",
        decimal: str = ".",
        timezone: str = "UTC",
        quality_map: Mapping[str, bool] | None = None,
        pattern: str = "*.csv",
        settle_seconds: float = 5.0,
        chunk_rows: int = 200_000,
        name: str = "",
    ) -> None:
        super().__init__(tags, name=name)
        if layout not in ("auto", "wide", "long"):
            raise ValueError(f"layout must be 'auto', 'wide' or 'long', got {layout!r}")
        if len(delimiter) != 1 or delimiter in ('"', "\n", "\r"):
            raise ValueError(f"delimiter must be one character, got {delimiter!r}")
        if decimal not in (".", ","):
            raise ValueError(f"decimal must be '.' or ',', got {decimal!r}")
        if decimal == delimiter:
            raise ValueError(f"decimal and delimiter are both {decimal!r}")
        if chunk_rows < 1:
            raise ValueError(f"chunk_rows must be at least 1, got {chunk_rows}")
        if settle_seconds < 0:
            raise ValueError(f"settle_seconds must be >= 0, got {settle_seconds}")
        problem = pattern_problem(pattern)
        if problem:
            raise ValueError(f"pattern {problem}")
        try:
            self.zone = ZoneInfo(timezone)
        except (ZoneInfoNotFoundError, ValueError) as exc:
            raise ValueError(f"timezone {timezone!r} is not an IANA time zone name") from exc
        self.path = Path(path)
        self.layout = layout
        self.delimiter = delimiter
        self.decimal = decimal
        # what the parse of a file depends on: a file refused under other settings (a
        # header that did not split) is looked at again when these change
        self.settings_id = hashlib.sha256(repr(
            (layout, delimiter, decimal, sorted(self.tags))).encode()).hexdigest()[:16]
        self.pattern = pattern
        self.settle_seconds = float(settle_seconds)
        self.chunk_rows = int(chunk_rows)
        self.quality_map: Mapping[str, bool] = dict(quality_map or DEFAULT_QUALITY_MAP)
        # Units are checked here, once: a unit that does not convert is a config error.
        self._si = {tag: si_scale_offset(spec) for tag, spec in self.tags.items()}

    # ----------------------------------------------------------------- public API
    def check(self) -> list[str]:
        """Problems with the folder and the configured tags (empty when all is well)."""
        if not self.path.is_dir():
            return [f"folder {str(self.path)!r} does not exist or is not a folder"]
        listing = self._listing()
        links = [key for _, key, link in listing if link]
        files = [file for file, _, link in listing if not link]
        problems = [f"{key}: {_SYMLINK_REASON}" for key in links]
        if not files:
            return [*problems, f"no files matching {self.pattern!r} in {str(self.path)!r} yet"]
        try:
            newest = max(files, key=lambda p: p.stat().st_mtime)
            with open(newest, "rb") as fh:
                head = fh.read(MAX_LINE_BYTES)
        except OSError as exc:
            return [*problems, f"cannot read the newest export: {_plain(exc)}"]
        text_problem = _text_problem(head)
        if text_problem:
            return [*problems, f"{newest.name}: {text_problem}"]
        header, _, body = head.partition(b"\n")
        layout = self._layout(header)
        if isinstance(layout, str):
            return [*problems, f"{newest.name}: {layout}"]
        seen = {t for _, t in layout.tag_cols}
        if layout.kind == "long":
            text = body.decode("utf-8", errors="replace").splitlines()
            rows = csv.reader(text, delimiter=self.delimiter)
            seen = {r[layout.tag_col].strip() for r in rows if len(r) > layout.tag_col}
        return problems + [
            f"configured tag {t!r} does not appear in {newest.name}"
            for t in self.tags
            if t not in seen
        ]

    def batches(self, cursors: Mapping[str, Mapping[str, Any]]) -> Iterator[Batch]:
        """Yield what is new in the folder, file by file (sorted), chunk by chunk."""
        if not self.path.is_dir():
            raise SourceUnavailable(
                f"CSV folder {str(self.path)!r} does not exist: create it or fix [source] path"
            )
        for file, key, link in self._listing():
            cursor = cursors.get(key) or {}
            if link:
                if not cursor.get("symlink"):
                    log.warning("%s: %s", key, _SYMLINK_REASON)
                    yield self._batch(
                        key,
                        {"symlink": True},
                        {"symlinks_skipped": 1},
                        quarantine_frame([(key, 0, _SYMLINK_REASON, "")]),
                    )
                continue
            if cursor.get("symlink"):  # a link replaced by a real file: a new file
                cursor = {}
            yield from self._guarded(file, key, cursor, cursors)

    def _listing(self) -> list[tuple[Path, str, bool]]:
        """Files matching the pattern as (path, ledger key, is a link); links not followed.

        A file reached through a linked folder is listed once, as that folder's link.
        """
        out: list[tuple[Path, str, bool]] = []
        seen_links: set[str] = set()
        for found in sorted(self.path.glob(self.pattern)):
            parts = found.relative_to(self.path).parts
            depths = range(1, len(parts) + 1)
            link = next((i for i in depths if self.path.joinpath(*parts[:i]).is_symlink()), None)
            if link is not None:
                key = "/".join(parts[:link])
                if key not in seen_links:
                    seen_links.add(key)
                    out.append((self.path.joinpath(*parts[:link]), key, True))
            elif found.is_file():
                out.append((found, "/".join(parts), False))
        return out

    def _guarded(
        self,
        file: Path,
        key: str,
        cursor: Mapping[str, Any],
        cursors: Mapping[str, Mapping[str, Any]],
    ) -> Iterator[Batch]:
        """The batches of one file; a file that cannot be read ends as one quarantine row.

        What was yielded before the error stays delivered; the closing batch keeps that
        cursor and adds the reason and the file's size and time, so the file is not
        tried again until it changes.
        """
        last: dict[str, Any] = dict(cursor)
        try:
            for batch in self._scan(file, key, cursor, cursors):
                last = dict(batch.cursor)
                yield batch
            return
        except _Unreadable as exc:
            problem = exc
        except Exception as exc:
            problem = _Unreadable(_plain(exc))
            if not isinstance(exc, (OSError, csv.Error, UnicodeError, pa.ArrowException)):
                log.debug("%s: unexpected error while reading", key, exc_info=True)
        log.warning("%s: file quarantined: %s", key, problem.reason)
        done = dict(last, quarantined=problem.reason, complete_sha256=None,
                    settings=self.settings_id)
        try:
            st = file.stat()
            done.update(size=st.st_size, mtime_ns=st.st_mtime_ns, ctime_ns=st.st_ctime_ns)
        except OSError:
            done.update(size=None, mtime_ns=None)  # gone: it is not listed again
        quarantine = quarantine_frame([(key, problem.line, problem.reason, problem.raw)])
        yield self._batch(key, done, {"files_quarantined": 1, "quarantined": 1}, quarantine)

    # ----------------------------------------------------------------- one file
    def _scan(
        self,
        file: Path,
        key: str,
        cursor: Mapping[str, Any],
        cursors: Mapping[str, Mapping[str, Any]],
    ) -> Iterator[Batch]:
        st = file.stat()
        age = time.time() - st.st_mtime
        if age < self.settle_seconds:
            log.info("%s: skipped, modified %.1f s ago (still being written?)", key, age)
            yield self._batch(key, dict(cursor), {"files_unsettled": 1})
            return
        size, mtime_ns = st.st_size, st.st_mtime_ns
        # ctime too for a quarantined file: a chmod that makes it readable is a change
        ctime_ok = cursor.get("ctime_ns", st.st_ctime_ns) == st.st_ctime_ns
        refused = "bad_header" in cursor or "quarantined" in cursor
        if refused and cursor.get("settings") != self.settings_id:
            log.info("%s: refused under other [source] settings; read again", key)
            cursor = {}  # from the start, as a new file
        elif cursor.get("size") == size and cursor.get("mtime_ns") == mtime_ns and ctime_ok:
            return  # ledger quick check: unchanged since last read
        notes: Counter[str] = Counter()
        with open(file, "rb") as fh:
            offset, line, digest, fold = self._resume(fh, key, cursor, size, notes)
            if offset == 0 and not cursor:
                twin = self._twin(fh, size, cursors)
                if twin is not None:
                    log.info("%s: same bytes as %s, not read again", key, twin[0])
                    done = dict(twin[1], size=size, mtime_ns=mtime_ns)
                    yield self._batch(key, done, {"duplicate_file": 1})
                    return
            fh.seek(0)
            if offset == 0:
                head = fh.read(_SNIFF_BYTES)
                problem = _text_problem(head)
                if problem:
                    raise _Unreadable(problem, 0, _preview(head))
                fh.seek(0)
            header = fh.readline(MAX_LINE_BYTES + 1)
            if len(header) > MAX_LINE_BYTES:
                raise _Unreadable(_too_long(1), 1, _preview(header))
            if offset == 0 and _header_not_utf8(header):
                raise _Unreadable(
                    "not a text CSV file: its header line is not UTF-8 text "
                    "(export the file as UTF-8)",
                    1,
                    _preview(header),
                )
            if not header.endswith(b"\n"):
                note = {"empty_file": 1} if size == 0 else {"unterminated_last_line": 1}
                cur = self._cursor(0, 0, hashlib.sha256(), size, mtime_ns, {})
                yield self._batch(key, cur if size == 0 else dict(cursor), note)
                return
            layout = self._layout(header)
            if isinstance(layout, str):
                log.warning("%s: %s; file skipped until it or the settings change", key,
                            layout)
                quarantine = quarantine_frame([(key, 1, layout, header)])
                # not "read": kept apart until the file or the parse settings change
                refused_cursor = {"bad_header": layout, "settings": self.settings_id,
                                  "size": size, "mtime_ns": mtime_ns,
                                  "ctime_ns": st.st_ctime_ns}
                yield self._batch(key, refused_cursor, {"bad_header": 1}, quarantine)
                return
            first: pd.DataFrame | None = None
            if offset == 0:
                digest.update(header)
                offset, line = len(header), 1
                if layout.unknown:
                    reason = _unknown_columns(layout.unknown)
                    log.info("%s: %s", key, reason)
                    notes["unknown_tag_columns"] += len(layout.unknown)
                    first = quarantine_frame([(key, 1, reason, header)])
            yield from self._stream(fh, key, layout, (offset, line), digest, fold, notes, st, first)

    def _resume(
        self,
        fh: io.BufferedReader,
        key: str,
        cursor: Mapping[str, Any],
        size: int,
        notes: Counter[str],
    ) -> tuple[int, int, Any, dict[str, list[Any]]]:
        """Where to start in the file: (offset, line, running hash, repeated-hour state)."""
        offset = int(cursor.get("offset", 0))
        digest = hashlib.sha256()
        if offset <= 0:
            return 0, 0, digest, {}
        if size >= offset:
            remaining = offset
            while remaining:
                block = fh.read(min(remaining, 1 << 22))
                if not block:
                    break
                digest.update(block)
                remaining -= len(block)
            if digest.hexdigest() == cursor.get("sha256_prefix"):
                fold = {k: list(v) for k, v in (cursor.get("fold") or {}).items()}
                return offset, int(cursor.get("line", 0)), digest, fold
        log.warning("%s: the part read before has changed; reading it again from the start", key)
        notes["file_changed"] += 1
        return 0, 0, hashlib.sha256(), {}

    def _twin(
        self, fh: io.BufferedReader, size: int, cursors: Mapping[str, Mapping[str, Any]]
    ) -> tuple[str, Mapping[str, Any]] | None:
        """A completely read file with the same bytes as this new one, if any."""
        same_size = [
            (k, c) for k, c in cursors.items() if c.get("complete_sha256") and c.get("size") == size
        ]
        if not same_size or size == 0:
            return None
        fh.seek(0)
        digest = hashlib.sha256()
        for block in iter(lambda: fh.read(1 << 22), b""):
            digest.update(block)
        hexd = digest.hexdigest()
        return next(((k, c) for k, c in same_size if c["complete_sha256"] == hexd), None)

    def _stream(
        self,
        fh: io.BufferedReader,
        key: str,
        layout: _Layout,
        start: tuple[int, int],
        digest: Any,
        fold: dict[str, list[Any]],
        notes: Counter[str],
        st: Any,
        header_quarantine: pd.DataFrame | None,
    ) -> Iterator[Batch]:
        """Chunks of whole lines from *start* (offset, line), one batch each."""
        offset, line = start
        per_line = max(1, len(layout.tag_cols)) if layout.kind == "wide" else 1
        fh.seek(offset)
        sample = fh.read(1 << 16)
        line_len = max(8.0, len(sample) / max(1, sample.count(b"\n")))
        chunk_bytes = min(_MAX_CHUNK_BYTES, max(64, int(self.chunk_rows / per_line * line_len)))
        fh.seek(offset)
        rest = b""
        yielded = False
        while True:
            block = fh.read(chunk_bytes)
            data = rest + block
            cut = data.rfind(b"\n")
            if cut < 0:
                if block and len(data) <= MAX_LINE_BYTES:
                    rest = data  # one line longer than a chunk: read on
                    continue
                if block:  # a line longer than any record: skip to its end and read on
                    skipped = _skip_line(fh, data, digest)
                    if skipped is None:  # and no line end before the end of the file
                        raise _Unreadable(_too_long(line + 1), line + 1, _preview(data))
                    digest, length, rest = skipped
                    offset, line = offset + length, line + 1
                    log.warning("%s: line %d: %s", key, line, _LONG_LINE)
                    notes.update(quarantined=1, long_lines=1)
                    quarantine = quarantine_frame([(key, line, _LONG_LINE, _preview(data))])
                    if header_quarantine is not None:
                        quarantine = pd.concat([header_quarantine, quarantine], ignore_index=True)
                        header_quarantine = None
                    cursor = self._cursor(offset, line, digest, st.st_size, st.st_mtime_ns, fold)
                    yield self._batch(key, cursor, dict(notes), quarantine)
                    yielded, notes = True, Counter()
                    continue
                if data:
                    notes["unterminated_last_line"] += 1
                    log.info("%s: last line has no newline yet; left for the next scan", key)
                break
            whole, rest = data[: cut + 1], data[cut + 1 :]
            readings, quarantine, chunk_notes = self._parse(whole, line + 1, key, layout, fold)
            notes.update(chunk_notes)
            if header_quarantine is not None:
                quarantine = pd.concat([header_quarantine, quarantine], ignore_index=True)
                header_quarantine = None
            digest.update(whole)
            offset += len(whole)
            line += whole.count(b"\n")
            cursor = self._cursor(offset, line, digest, st.st_size, st.st_mtime_ns, fold)
            yield self._batch(key, cursor, dict(notes), quarantine, readings)
            yielded = True
            notes = Counter()
            if not block:
                break
        if notes or not yielded:
            cursor = self._cursor(offset, line, digest, st.st_size, st.st_mtime_ns, fold)
            yield self._batch(key, cursor, dict(notes), header_quarantine)

    @staticmethod
    def _cursor(
        offset: int, line: int, digest: Any, size: int, mtime_ns: int, fold: dict[str, list[Any]]
    ) -> dict[str, Any]:
        prefix = digest.hexdigest()
        cursor: dict[str, Any] = {
            "offset": offset,
            "line": line,
            "sha256_prefix": prefix,
            "complete_sha256": prefix if offset == size else None,
            "size": size if offset == size else None,
            "mtime_ns": mtime_ns if offset == size else None,
        }
        if fold:
            cursor["fold"] = {k: list(v) for k, v in fold.items()}
        return cursor

    @staticmethod
    def _batch(
        key: str,
        cursor: Mapping[str, Any],
        notes: Mapping[str, int],
        quarantine: pd.DataFrame | None = None,
        readings: pd.DataFrame | None = None,
    ) -> Batch:
        return Batch(
            readings=empty_readings() if readings is None else readings,
            quarantined=empty_quarantine() if quarantine is None else quarantine,
            cursor_key=key,
            cursor=cursor,
            notes={k: int(v) for k, v in notes.items() if v},
        )

    # ----------------------------------------------------------------- parsing
    def _layout(self, header: bytes) -> _Layout | str:
        """Read the header line; a string is the reason it cannot be used."""
        text = header.decode("utf-8", errors="replace").lstrip("\ufeff").rstrip("\r\n")
        names = [n.strip() for n in next(csv.reader([text], delimiter=self.delimiter), [])]
        if len(names) < 2:
            other = [d for d in (",", ";", "\t", "|") if d != self.delimiter and d in text]
            hint = (f"; it splits on {other[0]!r}: set [source] delimiter = {other[0]!r}"
                    if other else "")
            return f"no usable header line (need a time column and at least one more){hint}"
        tag_col, value_col = _find(names, _TAG_NAMES), _find(names, _VALUE_NAMES)
        kind = self.layout
        if kind == "auto":
            kind = "long" if tag_col >= 0 and value_col >= 0 else "wide"
        time_col = max(0, _find(names, _TIME_NAMES))
        if kind == "long":
            if tag_col < 0 or value_col < 0:  # explicit long without names: by position
                if len(names) < 3:
                    return "long layout needs timestamp, tag and value columns"
                time_col, tag_col, value_col = 0, 1, 2
            q = _find(names, _QUALITY_NAMES)
            return _Layout("long", len(names), time_col, (), (), tag_col, value_col, q)
        known = tuple((i, n) for i, n in enumerate(names) if i != time_col and n in self.tags)
        unknown = tuple(n for i, n in enumerate(names) if i != time_col and n not in self.tags)
        return _Layout("wide", len(names), time_col, known, unknown)

    def _split(self, data: bytes, first_line: int, layout: _Layout) -> _Chunk:
        """Columns of a chunk: pyarrow when every line is a row, else line by line."""
        wanted = [layout.time_col]
        types: dict[str, pa.DataType] = {f"c{layout.time_col}": pa.string()}
        if layout.kind == "wide":
            for col, _ in layout.tag_cols:
                wanted.append(col)
                types[f"c{col}"] = pa.float64()
        else:
            wanted += [c for c in (layout.tag_col, layout.value_col, layout.quality_col) if c >= 0]
            types.update({f"c{layout.tag_col}": pa.string(), f"c{layout.value_col}": pa.float64()})
            if layout.quality_col >= 0:
                types[f"c{layout.quality_col}"] = pa.string()
        try:
            data.decode("utf-8")
        except UnicodeDecodeError:  # Arrow refuses such a chunk, and its row handler
            return self._split_slowly(data, first_line, layout, wanted)  # cannot be called
        invalid: list[int] = []

        def on_invalid(_row: Any) -> str:
            invalid.append(1)
            return "skip"

        for typed in (True, False):
            try:
                table = pacsv.read_csv(
                    io.BytesIO(data),
                    read_options=pacsv.ReadOptions(
                        column_names=[f"c{i}" for i in range(layout.n_fields)]
                    ),
                    parse_options=pacsv.ParseOptions(
                        delimiter=self.delimiter,
                        ignore_empty_lines=False,
                        invalid_row_handler=on_invalid,
                    ),
                    convert_options=pacsv.ConvertOptions(
                        column_types=types if typed else {k: pa.string() for k in types},
                        include_columns=[f"c{i}" for i in wanted],
                        decimal_point=self.decimal,
                        null_values=list(NULL_TOKENS),
                        strings_can_be_null=False,
                    ),
                )
            except pa.ArrowInvalid:
                invalid.clear()
                continue  # a cell that is not a number: read the columns as text
            # a quote left open joins lines into one row (Arrow lets a quoted field span
            # a newline): then rows are not lines, and each line is split on its own
            if invalid or table.num_rows != data.count(b"\n"):
                break
            lines = np.arange(first_line, first_line + table.num_rows, dtype=np.int64)
            cols = {i: _column(table.column(f"c{i}")) for i in wanted}
            odd = {i: _nonfinite(table.column(f"c{i}")) for i in wanted if _is_float(cols[i])}
            return _Chunk(lines, cols, [], 0, {i: m for i, m in odd.items() if m.any()})
        return self._split_slowly(data, first_line, layout, wanted)

    def _split_slowly(
        self, data: bytes, first_line: int, layout: _Layout, wanted: list[int]
    ) -> _Chunk:
        """Line by line, for chunks with lines pyarrow cannot place (wrong field count)."""
        text = data.decode("utf-8", errors="replace").split("\n")[:-1]
        raw = [t.rstrip("\r") for t in text]
        lines: list[int] = []
        rows: list[list[str]] = []
        bad: list[tuple[int, str, str]] = []
        blank = 0
        for i, text_line in enumerate(raw):
            # One reader per line: an unclosed quote must not swallow the good lines after it.
            number = first_line + i
            if len(text_line) > MAX_LINE_BYTES:
                bad.append((number, _LONG_LINE, text_line[:RAW_MAX]))
                continue
            try:
                fields = next(csv.reader([text_line], delimiter=self.delimiter, strict=False), [])
            except csv.Error as exc:  # e.g. a field longer than the csv module's limit
                bad.append((number, f"line cannot be split: {exc}", text_line[:RAW_MAX]))
                continue
            if not fields or all(not f.strip() for f in fields):
                blank += 1
            elif len(fields) != layout.n_fields:
                reason = f"expected {layout.n_fields} fields, found {len(fields)}"
                bad.append((number, reason, text_line))
            else:
                lines.append(number)
                rows.append(fields)
        cols: dict[int, Any] = {i: pa.array([r[i] for r in rows], type=pa.string()) for i in wanted}
        return _Chunk(np.asarray(lines, dtype=np.int64), cols, bad, blank)

    def _parse(
        self, data: bytes, first_line: int, key: str, layout: _Layout, fold: dict[str, list[Any]]
    ) -> tuple[pd.DataFrame, pd.DataFrame, Counter[str]]:
        """Readings, quarantine and notes of one chunk of whole lines."""
        chunk = self._split(data, first_line, layout)
        notes: Counter[str] = Counter(blank_lines=chunk.blank)
        notes["long_lines"] += sum(reason == _LONG_LINE for _, reason, _ in chunk.bad_rows)
        bad: list[tuple[int, str]] = [(ln, r) for ln, r, _ in chunk.bad_rows]
        known_raw = {ln: raw for ln, _, raw in chunk.bad_rows}
        tcol = chunk.cols[layout.time_col]
        value_cols = [c for c in chunk.cols if c != layout.time_col]
        is_blank = _blank_rows(tcol, [chunk.cols[c] for c in value_cols])
        notes["blank_lines"] += int(is_blank.sum())
        keep = ~is_blank
        tags: tuple[npt.NDArray[np.intp], npt.NDArray[Any]] | None = None
        if layout.kind == "long":
            # Tags as codes into their distinct names: Python strings only for those.
            tags = encode_text(chunk.cols[layout.tag_col])
            keys = tags[1][tags[0]]
            times, status = parse_times(tcol, self.zone, keys=keys, fold=fold)
        else:
            times, status = parse_times(tcol, self.zone, fold=fold)
        for code, reason in TIME_REASONS.items():
            hit = keep & (status == code)
            bad += [(int(ln), reason) for ln in chunk.lines[hit]]
            keep &= ~hit
        if layout.kind == "wide":
            readings = self._wide(chunk, layout, times, keep, bad, notes)
        else:
            assert tags is not None
            readings = self._long(chunk, layout, times, tags, keep, bad, notes)
        # Wide rows can only repeat a (time, tag) pair through a repeated time: check the
        # cheap condition first, the full drop costs more than the whole parse.
        if layout.kind == "long" or times[keep].has_duplicates:
            before = len(readings)
            readings = readings.drop_duplicates(["time", "tag"], keep="last", ignore_index=True)
            notes["duplicate_rows"] += before - len(readings)
        steps = np.diff(times[keep].asi8)
        notes["out_of_order_rows"] += int(np.count_nonzero(steps < 0))
        notes["quarantined"] += len(bad)
        return readings, self._quarantine_rows(data, first_line, key, bad, known_raw), notes

    def _wide(
        self,
        chunk: _Chunk,
        layout: _Layout,
        times: pd.DatetimeIndex,
        keep: npt.NDArray[np.bool_],
        bad: list[tuple[int, str]],
        notes: Counter[str],
    ) -> pd.DataFrame:
        if not layout.tag_cols:
            return empty_readings()
        columns = []
        for col, tag in layout.tag_cols:
            values = chunk.cols[col]
            odd = chunk.nonfinite.get(col)
            if not _is_float(values):
                values, wrong, odd = to_float(values, self.decimal)
                hit = wrong & keep
                bad += [(int(ln), f"value of {tag} is not a number") for ln in chunk.lines[hit]]
            if odd is not None and (odd & keep).any():
                notes["nonfinite_values"] += int((odd & keep).sum())
                bad += [(int(chunk.lines[i]), r) for i, r in nonfinite_groups(odd & keep, tag)]
                values = np.where(odd, np.nan, values)
            columns.append(values)
        # One (tags x rows) matrix: scaling, masking and melting in a few array operations.
        matrix = np.vstack(columns)
        si = np.array([self._si[tag] for _, tag in layout.tag_cols])
        finite = np.isfinite(matrix)
        with np.errstate(over="ignore", invalid="ignore"):
            matrix = matrix * si[:, :1] + si[:, 1:]
        overflow = finite & ~np.isfinite(matrix) & keep[None, :]
        for row, (_, tag) in enumerate(layout.tag_cols):
            bad += [(int(ln), _overflow_reason(tag)) for ln in chunk.lines[overflow[row]]]
        ok = np.isfinite(matrix) & keep[None, :]
        names = np.array([tag for _, tag in layout.tag_cols], dtype=object)
        tag_col = np.repeat(names, ok.sum(axis=1))
        time_ns = np.broadcast_to(times.asi8, matrix.shape)[ok]
        return readings_frame(time_ns, tag_col, matrix[ok], None)

    def _long(
        self,
        chunk: _Chunk,
        layout: _Layout,
        times: pd.DatetimeIndex,
        tags: tuple[npt.NDArray[np.intp], npt.NDArray[Any]],
        keep: npt.NDArray[np.bool_],
        bad: list[tuple[int, str]],
        notes: Counter[str],
    ) -> pd.DataFrame:
        ids, uniques = tags
        values = chunk.cols[layout.value_col]
        wrong = np.zeros(len(values), dtype=bool)
        odd = chunk.nonfinite.get(layout.value_col, wrong)
        if not _is_float(values):
            values, wrong, odd = to_float(values, self.decimal)
        blank_tag = keep & (uniques[ids] == "")
        bad += [(int(ln), "blank tag") for ln in chunk.lines[blank_tag]]
        keep &= ~blank_tag
        odd = keep & odd
        if odd.any():
            notes["nonfinite_values"] += int(odd.sum())
            bad += [(int(chunk.lines[i]), r) for i, r in nonfinite_groups(odd, uniques[ids])]
            keep &= ~odd
        for mask, reason in (
            (keep & wrong, "value is not a number"),
            (keep & ~wrong & ~np.isfinite(values), "blank value"),
        ):
            bad += [(int(ln), reason) for ln in chunk.lines[mask]]
            keep &= ~mask
        scale = np.full(len(uniques), np.nan)
        offset = np.zeros(len(uniques))
        unknown: list[tuple[int, str, int]] = []  # (first line, tag, rows)
        for i, name in enumerate(uniques):
            if name in self._si:
                scale[i], offset[i] = self._si[name]
            elif name:
                rows = keep & (ids == i)
                count = int(rows.sum())
                if count:
                    unknown.append((int(chunk.lines[np.argmax(rows)]), str(name), count))
                    keep &= ~rows
        if unknown:
            total = sum(n for _, _, n in unknown)
            notes["unknown_tag_rows"] += total
            if len(unknown) <= GROUP_AT:
                bad += [(ln, f"unknown tag {t!r} ({n} rows in this chunk)") for ln, t, n in unknown]
            else:
                unknown.sort()
                names = name_list([t for _, t, _ in unknown])
                reason = f"{len(unknown):,} tags are not configured tags ({total:,} rows): {names}"
                bad.append((unknown[0][0], reason))
        good = np.ones(len(values), dtype=bool)
        if layout.quality_col >= 0:
            good, unmapped = quality_good(chunk.cols[layout.quality_col], self.quality_map)
            notes["unmapped_quality"] += unmapped
        with np.errstate(over="ignore", invalid="ignore"):
            si = values * scale[ids] + offset[ids]
        overflow = keep & ~np.isfinite(si)
        bad += [(int(chunk.lines[i]), _overflow_reason(str(uniques[ids[i]])))
                for i in np.flatnonzero(overflow)]
        keep &= ~overflow
        return readings_frame(times.asi8[keep], uniques[ids[keep]], si[keep], good[keep])

    @staticmethod
    def _quarantine_rows(
        data: bytes, first_line: int, key: str, bad: list[tuple[int, str]], known: dict[int, str]
    ) -> pd.DataFrame:
        if not bad:
            return empty_quarantine()
        lines = data.split(b"\n")
        rows = []
        for number, reason in sorted(bad):
            raw = known.get(number)
            if raw is None:
                raw = lines[number - first_line].decode("utf-8", errors="replace").rstrip("\r")
            rows.append((key, number, reason, raw))
        return quarantine_frame(rows)


def _overflow_reason(tag: str) -> str:
    return f"value of {tag} is too large: it overflows when converted to SI units"


def _nonfinite(arr: pa.ChunkedArray) -> npt.NDArray[np.bool_]:
    """Cells of a float column that hold NaN or infinity (not the empty ones)."""
    odd = pc.and_(pc.is_valid(arr), pc.invert(pc.is_finite(arr)))
    return np.asarray(odd.to_numpy(zero_copy_only=False), dtype=bool)


def _text_problem(head: bytes) -> str | None:
    """Why the first bytes of a file are not a text CSV export, or None."""
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):
        return "not a text CSV file: it is UTF-16 text (export the file as UTF-8)"
    if b"\x00" in head:
        return f"not a text CSV file: NUL byte at byte {head.index(0):,} (a binary file?)"
    return None


def _header_not_utf8(header: bytes) -> bool:
    try:
        header.decode("utf-8")
    except UnicodeDecodeError:
        return True
    return False


def _preview(data: bytes) -> str:
    """The first bytes of *data* as printable text for the quarantine (escaped)."""
    sample = data[:80]
    try:
        return sample.decode("utf-8")
    except UnicodeDecodeError:
        return repr(sample)[2:-1]


def _skip_line(fh: io.BufferedReader, data: bytes, digest: Any) -> tuple[Any, int, bytes] | None:
    """Read past the end of the line *data* starts: (hash updated with the line, the
    line's length with its newline, the bytes read after it); None if the file ends first
    (the file's hash is then left as it was)."""
    probe = digest.copy()
    probe.update(data)
    length = len(data)
    for block in iter(lambda: fh.read(1 << 22), b""):
        cut = block.find(b"\n")
        if cut >= 0:
            probe.update(block[: cut + 1])
            return probe, length + cut + 1, block[cut + 1 :]
        probe.update(block)
        length += len(block)
    return None


def _too_long(line: int) -> str:
    return (
        f"line {line:,} is longer than {MAX_LINE_BYTES:,} bytes: not a CSV export "
        "with one record per line"
    )


def _unknown_columns(names: Sequence[str]) -> str:
    """One quarantine reason for all the columns of unknown tags of a file."""
    if len(names) == 1:
        return f"1 column is not a configured tag: {name_list(names)}"
    return f"{len(names):,} columns are not configured tags: {name_list(names)}"


def _plain(exc: BaseException) -> str:
    """A file error as a plain reason (the quarantine keeps 200 characters)."""
    if isinstance(exc, FileNotFoundError):
        return "file vanished while it was being read"
    if isinstance(exc, PermissionError):
        return "file cannot be opened: permission denied (check the export job's file mode)"
    if isinstance(exc, IsADirectoryError):
        return "not a file but a folder"
    if isinstance(exc, OSError):
        return f"file cannot be read: {exc.strerror or exc}"
    if isinstance(exc, csv.Error):
        return f"file cannot be split as CSV: {exc}"
    if isinstance(exc, UnicodeError):
        return "not a text CSV file: bytes that are not UTF-8 text (export the file as UTF-8)"
    return f"file cannot be read: {type(exc).__name__}: {exc}"[:200]


def _column(arr: pa.ChunkedArray) -> Any:
    """A float column as numpy (NaN for empty); a text column stays in Arrow."""
    if pa.types.is_floating(arr.type):
        return arr.to_numpy().astype(np.float64, copy=False)
    return arr.combine_chunks()


def _is_float(col: Any) -> bool:
    return isinstance(col, np.ndarray) and col.dtype == np.float64


def _empty_text(col: Any) -> npt.NDArray[np.bool_]:
    return np.asarray(pc.equal(arrow_text(col), "").to_numpy(zero_copy_only=False), dtype=bool)


def _blank_rows(times: Any, others: list[Any]) -> npt.NDArray[np.bool_]:
    """Rows where every read cell is empty (blank lines, or lines of bare delimiters)."""
    blank = _empty_text(times)
    for col in others:
        if not blank.any():
            break
        blank &= np.isnan(col) if _is_float(col) else _empty_text(col)
    return blank
