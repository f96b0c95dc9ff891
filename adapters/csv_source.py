"""Readings from a folder of CSV exports (alias ``csv``).

A historian job drops exports into a folder; `CsvSource.batches` reads what is new.
This module keeps the file ledger and the source; the header line is read in
`adapters.csv_layout`, each chunk of lines is parsed in `adapters.csv_chunks` (where
`MAX_LINE_BYTES` and `GROUP_AT` are defined).

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
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pandas as pd
import pyarrow as pa

from adapters.base import ReadingsSource, SourceUnavailable
from adapters.csv_chunks import LONG_LINE_REASON, MAX_LINE_BYTES, CsvChunkParser
from adapters.csv_layout import (
    CsvHeader,
    HeaderLayout,
    header_not_utf8,
    not_text_reason,
    unknown_columns_reason,
)
from adapters.records import Batch, TagSpec, empty_quarantine, empty_readings
from adapters.source_tools import (
    DEFAULT_QUALITY_MAP,
    FileBatch,
    pattern_problem,
    quarantine_frame,
    si_scale_offset,
)

__all__ = ["CsvSource"]

log = logging.getLogger(__name__)

#: Upper bound of one read [bytes], whatever ``chunk_rows`` and the line length suggest.
_MAX_CHUNK_BYTES = 16 << 20
#: Bytes looked at to tell a text CSV from a binary file.
_SNIFF_BYTES = 1 << 16
_SYMLINK_REASON = "symbolic link: not followed (the inbox reads real files only)"


class _Unreadable(Exception):
    """A file that cannot be read as a CSV export: the reason, where, and a raw sample."""

    def __init__(self, reason: str, line: int = 0, raw: str = "") -> None:
        super().__init__(reason)
        self.reason, self.line, self.raw = reason, line, raw


class CsvSource(CsvHeader, CsvChunkParser, ReadingsSource):
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
        text_problem = not_text_reason(head)
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
                problem = not_text_reason(head)
                if problem:
                    raise _Unreadable(problem, 0, _preview(head))
                fh.seek(0)
            header = fh.readline(MAX_LINE_BYTES + 1)
            if len(header) > MAX_LINE_BYTES:
                raise _Unreadable(_too_long(1), 1, _preview(header))
            if offset == 0 and header_not_utf8(header):
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
                    reason = unknown_columns_reason(layout.unknown)
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
        layout: HeaderLayout,
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
                    log.warning("%s: line %d: %s", key, line, LONG_LINE_REASON)
                    notes.update(quarantined=1, long_lines=1)
                    quarantine = quarantine_frame([(key, line, LONG_LINE_REASON, _preview(data))])
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
        """The batch of file *key*; *readings* carry their file lines in a ``line``
        column, which becomes the batch's ``lines``."""
        if readings is None:
            readings = empty_readings().assign(line=np.zeros(0, dtype=np.int64))
        return FileBatch(
            readings=readings.drop(columns="line"),
            quarantined=empty_quarantine() if quarantine is None else quarantine,
            cursor_key=key,
            cursor=cursor,
            notes={k: int(v) for k, v in notes.items() if v},
            lines=readings["line"].to_numpy(dtype=np.int64),
        )


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

