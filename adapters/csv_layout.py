"""The header line of a CSV export: which layout, which column holds what.

`CsvHeader._layout` reads the header line into a `HeaderLayout` (wide or long, the time
column, the columns of known tags) or the reason it cannot be used; `not_text_reason` and
`header_not_utf8` tell a text export from a binary or UTF-16 file before that. The
layouts and their rules are described in `adapters.csv_source`.
"""

from __future__ import annotations

import csv
from collections.abc import Sequence
from dataclasses import dataclass

from adapters.records import TagSpec
from adapters.source_tools import name_list

_TIME_NAMES = ("timestamp", "time", "datetime", "date_time", "ts")
_TAG_NAMES = ("tag", "tagname", "tag_name", "point", "name")
_VALUE_NAMES = ("value", "val", "reading")
_QUALITY_NAMES = ("quality", "q", "status")

@dataclass(frozen=True)
class HeaderLayout:
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



class CsvHeader:
    """The header reading of `adapters.csv_source.CsvSource` (its settings below)."""

    layout: str
    delimiter: str
    tags: dict[str, TagSpec]

    def _layout(self, header: bytes) -> HeaderLayout | str:
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
            return HeaderLayout("long", len(names), time_col, (), (), tag_col, value_col, q)
        known = tuple((i, n) for i, n in enumerate(names) if i != time_col and n in self.tags)
        unknown = tuple(n for i, n in enumerate(names) if i != time_col and n not in self.tags)
        return HeaderLayout("wide", len(names), time_col, known, unknown)


def not_text_reason(head: bytes) -> str | None:
    """Why the first bytes of a file are not a text CSV export, or None."""
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):
        return "not a text CSV file: it is UTF-16 text (export the file as UTF-8)"
    if b"\x00" in head:
        return f"not a text CSV file: NUL byte at byte {head.index(0):,} (a binary file?)"
    return None


def header_not_utf8(header: bytes) -> bool:
    """Whether the header line *header* is not valid UTF-8."""
    try:
        header.decode("utf-8")
    except UnicodeDecodeError:
        return True
    return False



def unknown_columns_reason(names: Sequence[str]) -> str:
    """One quarantine reason for all the columns of unknown tags of a file."""
    if len(names) == 1:
        return f"1 column is not a configured tag: {name_list(names)}"
    return f"{len(names):,} columns are not configured tags: {name_list(names)}"

