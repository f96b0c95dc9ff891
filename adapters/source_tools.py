"""Shared pieces of the readings sources: SI scaling, quality codes, time parsing.

Used by `adapters.csv_source` and `adapters.sql_source` so that both apply the same
rules. Time rule for naive wall-clock text in the site zone (see `parse_times`):

* **missing hour** (spring forward): a wall time that does not exist gets status
  ``nonexistent local time`` and no UTC time; it is never shifted.
* **repeated hour** (fall back): for each series (tag), in the order given, wall times
  inside the repeated hour are read as daylight time (the first pass of the clock) until
  the wall clock steps back inside that hour; from the step back on they are standard
  time (the second pass). The rule's state can be carried between calls (``fold``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import numpy.typing as npt
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from adapters.records import Batch, TagSpec, empty_quarantine
from adapters.units import UnitError, converter

__all__ = [
    "DEFAULT_QUALITY_MAP",
    "NONFINITE_REASON",
    "NULL_TOKENS",
    "TIME_REASONS",
    "FileBatch",
    "arrow_text",
    "encode_text",
    "name_list",
    "nonfinite_groups",
    "parse_times",
    "pattern_problem",
    "quality_good",
    "quarantine_frame",
    "readings_frame",
    "si_scale_offset",
    "text_cells",
    "to_float",
]

#: Quality codes read as good when no map is configured (compared case-insensitively).
DEFAULT_QUALITY_MAP: Mapping[str, bool] = {"": True, "good": True, "192": True, "g": True}
RAW_MAX = 200  # characters of a bad line kept in quarantine
# Cells that mean "no value here" (not sampled). NaN and infinity are not among them: a
# historian that writes them has a value it could not compute, which the engineer sees as
# quarantine reason ``value is NaN/inf``.
_NA_TOKENS = frozenset({"", "na", "n/a", "null", "none", "#n/a"})
#: The same tokens in the spellings Arrow's CSV reader is given (it compares exactly; any
#: other spelling falls back to the case-insensitive text path).
NULL_TOKENS: tuple[str, ...] = (
    "", "NA", "na", "N/A", "n/a", "NULL", "null", "Null", "None", "none", "#N/A", "#n/a",
)
_NONFINITE_RE = r"(?i)^[+-]?(?:nan|inf|infinity)$"
NONFINITE_REASON = "value is NaN/inf"
_OFFSET_RE = r"\d:\d{2}(?::\d{2}(?:[.,]\d+)?)?\s*(?:[Zz]|[+-]\d{2}(?::?\d{2})?)$"
_FOLD_RESET = pd.Timedelta(hours=3)  # farther apart than this: a different repeated hour


def si_scale_offset(spec: TagSpec) -> tuple[float, float]:
    """Scale and offset with ``si = value * scale + offset`` for *spec*'s plant unit.

    Every plant unit is affine in its SI unit (°F → °C included), so two points fix it;
    a third point checks that. Raises `UnitError` naming the tag when the unit does not
    convert to the tag's kind.

    >>> si_scale_offset(TagSpec("PT-1", "bar", "pressure"))
    (100000.0, 0.0)
    """
    try:
        conv = converter(spec.unit, spec.kind)
    except UnitError as exc:
        raise UnitError(f"tag {spec.tag!r}: {exc}") from exc
    y = conv([0.0, 1.0, 1000.0])
    offset, scale = float(y[0]), float(y[1] - y[0])
    if not np.isclose(y[2], offset + 1000.0 * scale, rtol=1e-9, atol=1e-9):
        raise UnitError(f"tag {spec.tag!r}: unit {spec.unit!r} is not affine in SI")
    return scale, offset


def quality_good(
    codes: Sequence[Any] | npt.NDArray[Any] | pd.Series, quality_map: Mapping[str, bool]
) -> tuple[npt.NDArray[np.bool_], int]:
    """Map quality codes to good (True) / bad; unmapped codes are bad.

    Returns the boolean array and the number of unmapped codes. Codes are compared
    stripped and case-insensitively; a missing code reads as ``""``.

    >>> quality_good(["G", "bad", None, "192"], DEFAULT_QUALITY_MAP)
    (array([ True, False,  True,  True]), 1)
    """
    ids, uniques = encode_text(codes)
    lookup = {str(k).strip().lower(): bool(v) for k, v in quality_map.items()}
    keys = [str(code).lower() for code in uniques]
    table = np.array([lookup.get(k, False) for k in keys], dtype=bool)
    mapped = np.array([k in lookup for k in keys], dtype=bool)
    return table[ids], int(np.count_nonzero(~mapped[ids]))


def to_float(
    strings: Any, decimal: str
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.bool_], npt.NDArray[np.bool_]]:
    """Parse text cells to floats.

    Returns (values with NaN where there is no usable number, mask of cells that are not
    numbers, mask of cells that spell NaN or infinity).

    >>> v, bad, odd = to_float(["1,5", "", "x", "-inf", "NaN"], ",")
    >>> v.tolist()[:1], bad.tolist(), odd.tolist()
    ([1.5], [False, False, True, False, False], [False, False, False, True, True])
    """
    s = pd.Series(text_cells(strings), dtype=object)
    missing = s.str.lower().isin(_NA_TOKENS).to_numpy()
    nonfinite = s.str.match(_NONFINITE_RE).to_numpy(dtype=bool)
    # a point in a decimal-comma export is no decimal mark there (and may be a thousands
    # separator: "1.500" is 1500): not a number, rather than a value off by 1000
    wrong_mark = s.str.contains(".", regex=False).to_numpy(dtype=bool) if decimal != "." \
        else np.zeros(len(s), dtype=bool)
    if decimal != ".":
        s = s.str.replace(decimal, ".", regex=False)
    num = pd.to_numeric(s, errors="coerce").to_numpy(dtype=float, copy=True)
    bad = ~missing & ~nonfinite & (~np.isfinite(num) | wrong_mark)
    num[missing | bad | nonfinite] = np.nan
    return num, bad, nonfinite


def pattern_problem(pattern: str) -> str | None:
    """Why a file name *pattern* could reach outside its folder, or None when it cannot.

    >>> pattern_problem("exports/*.csv") is None, pattern_problem("../*.csv")
    (True, "must stay inside the folder: remove the '..' part of '../*.csv'")
    """
    if not pattern.strip():
        return "must not be empty: give a file name pattern such as '*.csv'"
    if pattern.startswith(("/", "\\", "~")) or (len(pattern) > 1 and pattern[1] == ":"):
        return f"must be relative to the folder, got the absolute pattern {pattern!r}"
    if ".." in pattern.replace("\\", "/").split("/"):
        return f"must stay inside the folder: remove the '..' part of {pattern!r}"
    return None


def nonfinite_groups(
    mask: npt.NDArray[np.bool_], tags: npt.NDArray[Any] | str
) -> list[tuple[int, str]]:
    """NaN/inf cells grouped per tag: (index of the first cell, reason with the count).

    One quarantine row per tag and chunk (a file of NaN would otherwise give one row per
    cell). *tags* is one tag per cell, or one tag for all.

    >>> nonfinite_groups(np.array([False, True, True]), "FT-1")
    [(1, 'value is NaN/inf: 2 cells of FT-1')]
    """
    hits = np.flatnonzero(mask)
    if not hits.size:
        return []
    if isinstance(tags, str):
        groups = {tags: hits}
    else:
        names = np.asarray(tags, dtype=object)[hits]
        groups = {str(t): hits[names == t] for t in dict.fromkeys(names.tolist())}
    out = []
    for tag, where in groups.items():
        cells = "1 cell" if where.size == 1 else f"{where.size:,} cells"
        out.append((int(where[0]), f"{NONFINITE_REASON}: {cells} of {tag}"))
    return out


def name_list(names: Sequence[str], *, shown: int = 3, width: int = 40) -> str:
    """The first few *names* and how many more: 'A1, A2, A3 … (9,996 more)'.

    Keeps a grouped quarantine reason short whatever the number of names.

    >>> name_list([f"A{i}" for i in range(1, 10_000)])
    'A1, A2, A3 … (9,996 more)'
    """
    head = ", ".join(n if len(n) <= width else n[: width - 1] + "…" for n in names[:shown])
    rest = len(names) - shown
    return f"{head} … ({rest:,} more)" if rest > 0 else head


TIME_OK, TIME_BLANK, TIME_UNPARSED, TIME_NONEXISTENT = 0, 1, 2, 3
TIME_REASONS = {
    TIME_BLANK: "blank timestamp",
    TIME_UNPARSED: "unparseable timestamp",
    TIME_NONEXISTENT: "nonexistent local time",
}


def parse_times(
    strings: Sequence[Any] | npt.NDArray[Any] | pd.Series,
    zone: ZoneInfo,
    *,
    keys: npt.NDArray[Any] | None = None,
    fold: dict[str, list[Any]] | None = None,
) -> tuple[pd.DatetimeIndex, npt.NDArray[np.int8]]:
    """Parse ISO-8601 text to UTC; naive text is wall time in *zone* (rule: module doc).

    *keys* (one per row, e.g. the tag) separate the repeated-hour rule per series;
    *fold* is its state, updated in place. Returns the UTC times (NaT where bad) and a
    status per row (0 ok, 1 blank, 2 unparseable, 3 nonexistent local time).

    >>> t, s = parse_times(["2026-03-08 02:30", "2026-01-01T06:00Z", "x"],
    ...                    ZoneInfo("America/Chicago"))
    >>> [str(v) for v in t], s.tolist()
    (['NaT', '2026-01-01 06:00:00+00:00', 'NaT'], [3, 0, 2])
    """
    # Each distinct string is tested and parsed once (a long file repeats every instant
    # once per tag), with Arrow's vectorised text kernels: a Python regex per row costs
    # more than the whole CSV parse.
    idx, uniq = encode_text(strings)
    text = pd.Series(uniq, dtype=object)
    m = len(uniq)
    u_status = np.zeros(m, dtype=np.int8)
    u_utc = np.full(m, np.datetime64("NaT", "ns"), dtype="datetime64[ns]")
    u_blank = (text == "").to_numpy()
    u_status[u_blank] = TIME_BLANK
    regex = pc.match_substring_regex(pa.array(uniq, type=pa.string()), _OFFSET_RE)
    u_aware = regex.to_numpy(zero_copy_only=False) & ~u_blank
    if u_aware.any():
        u_utc[u_aware] = _to_utc_naive(text[u_aware], utc=True)
    u_naive = ~u_aware & ~u_blank
    out = u_utc[idx]
    if u_naive.any():
        wall = np.full(m, np.datetime64("NaT", "ns"), dtype="datetime64[ns]")
        wall[u_naive] = _to_utc_naive(text[u_naive], utc=False)
        dst, std = _localize_both(wall, zone)
        u_status[u_naive & ~np.isnat(wall) & np.isnat(dst)] = TIME_NONEXISTENT
        naive_rows = u_naive[idx]
        out[naive_rows] = dst[idx][naive_rows]
        amb = np.flatnonzero(naive_rows & ~np.isnat(dst[idx]) & (dst[idx] != std[idx]))
        if amb.size:
            out[amb] = _fold_rule(amb, wall[idx], dst[idx], std[idx], keys, fold)
    u_status[(u_status == TIME_OK) & np.isnat(u_utc) & ~u_naive] = TIME_UNPARSED
    status = u_status[idx]
    status[(status == TIME_OK) & np.isnat(out)] = TIME_UNPARSED
    return pd.DatetimeIndex(out).tz_localize("UTC"), status


def _to_utc_naive(text: pd.Series, *, utc: bool) -> npt.NDArray[np.datetime64]:
    """ISO-8601 text → datetime64[ns] (UTC when *utc*, else wall time), NaT if bad."""
    parsed = pd.DatetimeIndex(pd.to_datetime(text, format="ISO8601", utc=utc, errors="coerce"))
    if parsed.tz is not None:  # offsets, or a zone name inside the text: exact
        parsed = parsed.tz_convert("UTC").tz_localize(None)
    # outside 1677-09-21 … 2262-04-11 no nanosecond time exists: unparseable, not a crash
    inside = (parsed >= pd.Timestamp.min) & (parsed <= pd.Timestamp.max)
    parsed = pd.DatetimeIndex(parsed.where(inside))
    return parsed.as_unit("ns").to_numpy()


def _localize_both(
    wall: npt.NDArray[np.datetime64], zone: ZoneInfo
) -> tuple[npt.NDArray[np.datetime64], npt.NDArray[np.datetime64]]:
    """Wall times in *zone* → UTC read as daylight and as standard time (NaT: missing)."""
    index = pd.DatetimeIndex(wall)
    if zone.key == "UTC":
        return wall, wall
    n = len(index)
    dst = index.tz_localize(zone, ambiguous=np.ones(n, bool), nonexistent="NaT")
    std = index.tz_localize(zone, ambiguous=np.zeros(n, bool), nonexistent="NaT")
    return (
        dst.tz_convert("UTC").tz_localize(None).as_unit("ns").to_numpy(),
        std.tz_convert("UTC").tz_localize(None).as_unit("ns").to_numpy(),
    )


def _fold_rule(
    rows: npt.NDArray[np.intp],
    wall: npt.NDArray[np.datetime64],
    dst: npt.NDArray[np.datetime64],
    std: npt.NDArray[np.datetime64],
    keys: npt.NDArray[Any] | None,
    fold: dict[str, list[Any]] | None,
) -> npt.NDArray[np.datetime64]:
    """UTC of the repeated-hour *rows*, in order, by the rule of the module docstring."""
    state = fold if fold is not None else {}
    out = dst[rows].copy()
    for j, i in enumerate(rows):  # at most the rows of one hour per series: a short loop
        key = str(keys[i]) if keys is not None else "*"
        here = pd.Timestamp(wall[i])
        entry = state.get(key)
        if entry is not None and abs(here - pd.Timestamp(entry[0])) > _FOLD_RESET:
            entry = None
        if entry is None:
            state[key] = [here.isoformat(), False]
        elif entry[1] or here < pd.Timestamp(entry[0]):
            entry[1] = True
            out[j] = std[i]
        else:
            entry[0] = here.isoformat()
    return out


def encode_text(values: Any) -> tuple[npt.NDArray[np.intp], npt.NDArray[Any]]:
    """Text cells as (code per row, distinct stripped texts); missing reads as ""."""
    encoded = pc.dictionary_encode(arrow_text(values))
    codes = encoded.indices.to_numpy(zero_copy_only=False).astype(np.intp, copy=False)
    return codes, np.asarray(encoded.dictionary.to_pylist(), dtype=object)


def text_cells(values: Any) -> npt.NDArray[Any]:
    """Stripped text per row, as an object array ("" for missing)."""
    codes, uniques = encode_text(values)
    return uniques[codes]


def arrow_text(values: Any) -> pa.Array:
    """Text cells as an Arrow string array, stripped, "" for missing."""
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    if isinstance(values, pa.Array):
        arr = values if values.type == pa.string() else pc.cast(values, pa.string())
    else:
        try:
            arr = pa.array(values, type=pa.string(), from_pandas=True)
        except (pa.ArrowInvalid, pa.ArrowTypeError):  # not all str: take each one's text
            texts = ["" if v is None or v != v else str(v) for v in values]
            arr = pa.array(texts, type=pa.string())
    return pc.utf8_trim_whitespace(pc.fill_null(arr, ""))


@dataclass(frozen=True)
class FileBatch(Batch):
    """A `Batch` of a file source that says where each reading came from: ``lines`` is
    the file line of each row of ``readings`` (numbered as the quarantine numbers them;
    the file is the batch's ``cursor_key``), so that the store can journal a correction
    with the line of the export that brought it."""

    lines: npt.NDArray[np.int64] | None = None

    def __post_init__(self) -> None:
        if self.lines is not None and len(self.lines) != len(self.readings):
            raise ValueError(f"lines has {len(self.lines)} entries for "
                             f"{len(self.readings)} readings; one per reading is needed")


def readings_frame(
    time_ns: npt.NDArray[np.int64],
    tags: npt.NDArray[Any],
    values: npt.NDArray[np.float64],
    good: npt.NDArray[np.bool_] | None,
) -> pd.DataFrame:
    """A readings frame with the exact dtypes of `empty_readings`."""
    return pd.DataFrame(
        {
            "time": pd.DatetimeIndex(time_ns.view("datetime64[ns]")).tz_localize("UTC"),
            "tag": pd.Series(tags, dtype=object),
            "value": np.asarray(values, dtype=np.float64),
            "good": np.ones(len(values), dtype=bool) if good is None else good,
        }
    )


def quarantine_frame(rows: list[tuple[str, int, str, Any]]) -> pd.DataFrame:
    """A quarantine frame from (origin, line, reason, raw) tuples; raw is truncated."""
    if not rows:
        return empty_quarantine()
    origin, line, reason, raw = zip(*rows, strict=True)
    # NUL cannot be stored in a PostgreSQL text column: shown escaped, like other bytes
    # of a binary file would be.
    texts = [
        (r.decode("utf-8", errors="replace") if isinstance(r, bytes) else str(r))
        .rstrip("\r\n")[:RAW_MAX]
        .replace("\x00", "\\x00")
        for r in raw
    ]
    return pd.DataFrame(
        {
            "origin": pd.Series(origin, dtype=object),
            "line": pd.Series(line, dtype="int64"),
            "reason": pd.Series(reason, dtype=object),
            "raw": pd.Series(texts, dtype=object),
        }
    )
