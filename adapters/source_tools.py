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
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import numpy.typing as npt
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from adapters.base import TagSpec, empty_quarantine
from adapters.units import UnitError, converter

__all__ = [
    "DEFAULT_QUALITY_MAP",
    "TIME_REASONS",
    "parse_times",
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
_NA_TOKENS = frozenset({"", "nan", "na", "n/a", "null", "none", "#n/a", "-nan"})
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
    series = pd.Series(codes, dtype=object)
    ids, uniques = pd.factorize(series, use_na_sentinel=True)
    lookup = {str(k).strip().lower(): bool(v) for k, v in quality_map.items()}
    table = np.empty(len(uniques) + 1, dtype=bool)
    mapped = np.empty(len(uniques) + 1, dtype=bool)
    for i, code in enumerate(uniques):
        key = str(code).strip().lower()
        mapped[i] = key in lookup
        table[i] = lookup.get(key, False)
    table[-1] = lookup.get("", False)  # missing code (NA sentinel -1 hits the last slot)
    mapped[-1] = "" in lookup
    ids = np.asarray(ids)
    return table[ids], int(np.count_nonzero(~mapped[ids]))


def to_float(
    strings: npt.NDArray[Any], decimal: str
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.bool_]]:
    """Parse text cells to floats: (values with NaN for missing, mask of bad cells)."""
    s = pd.Series(strings, dtype=object).fillna("").astype(str).str.strip()
    missing = s.str.lower().isin(_NA_TOKENS).to_numpy()
    if decimal != ".":
        s = s.str.replace(decimal, ".", regex=False)
    num = pd.to_numeric(s, errors="coerce").to_numpy(dtype=float, copy=True)
    bad = ~missing & ~np.isfinite(num)
    num[missing | bad] = np.nan
    return num, bad


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
    # Vectorised text tests in Arrow (RE2): a Python regex per row costs more than the
    # whole CSV parse.
    arr = _arrow_text(strings)
    s = pd.Series(arr.to_numpy(zero_copy_only=False), dtype=object)
    n = len(s)
    status = np.zeros(n, dtype=np.int8)
    out = np.full(n, np.datetime64("NaT", "ns"), dtype="datetime64[ns]")
    blank = pc.equal(arr, "").to_numpy(zero_copy_only=False)
    status[blank] = TIME_BLANK
    aware = pc.match_substring_regex(arr, _OFFSET_RE).to_numpy(zero_copy_only=False) & ~blank
    if aware.any():
        t = _distinct_to_datetime(s[aware], utc=True)
        out[aware] = t.tz_localize(None).as_unit("ns").to_numpy()
    naive = ~aware & ~blank
    if naive.any():
        wall = _distinct_to_datetime(s[naive], utc=False).as_unit("ns")
        if wall.tz is not None:  # a zone name inside the text: already exact
            out[naive] = wall.tz_convert("UTC").tz_localize(None).to_numpy()
        else:
            out[naive] = _localize(wall, zone, keys[naive] if keys is not None else None, fold)
            nonexistent = np.zeros(n, dtype=bool)
            nonexistent[naive] = wall.notna() & np.isnat(out[naive])
            status[nonexistent] = TIME_NONEXISTENT
    status[(status == TIME_OK) & np.isnat(out)] = TIME_UNPARSED
    return pd.DatetimeIndex(out).tz_localize("UTC"), status


def _distinct_to_datetime(text: pd.Series, *, utc: bool) -> pd.DatetimeIndex:
    """ISO-8601 text to datetimes, each distinct string parsed once (long files repeat
    every instant once per tag)."""
    codes, uniques = pd.factorize(text)
    parsed = pd.DatetimeIndex(
        pd.to_datetime(pd.Series(uniques, dtype=object), format="ISO8601", utc=utc, errors="coerce")
    ).as_unit("ns")
    return parsed[codes]


def _localize(
    wall: pd.DatetimeIndex,
    zone: ZoneInfo,
    keys: npt.NDArray[Any] | None,
    fold: dict[str, list[Any]] | None,
) -> npt.NDArray[np.datetime64]:
    """Naive wall times in *zone* → naive UTC; nonexistent → NaT; repeated hour by rule."""
    n = len(wall)
    dst = wall.tz_localize(zone, ambiguous=np.ones(n, bool), nonexistent="NaT")
    std = wall.tz_localize(zone, ambiguous=np.zeros(n, bool), nonexistent="NaT")
    dst_u = dst.tz_convert("UTC").tz_localize(None).as_unit("ns").to_numpy().copy()
    std_u = std.tz_convert("UTC").tz_localize(None).as_unit("ns").to_numpy()
    ambiguous = np.flatnonzero(~np.isnat(dst_u) & (dst_u != std_u))
    if ambiguous.size == 0:
        return dst_u
    state = fold if fold is not None else {}
    wall_ns = wall.to_numpy()
    for i in ambiguous:  # at most the rows of one hour per series: a short loop
        key = str(keys[i]) if keys is not None else "*"
        here = pd.Timestamp(wall_ns[i])
        entry = state.get(key)
        if entry is not None and abs(here - pd.Timestamp(entry[0])) > _FOLD_RESET:
            entry = None
        if entry is None:
            state[key] = [here.isoformat(), False]
        elif entry[1] or here < pd.Timestamp(entry[0]):
            entry[1] = True
            dst_u[i] = std_u[i]
        else:
            entry[0] = here.isoformat()
    return dst_u


def text_cells(values: npt.NDArray[Any]) -> npt.NDArray[Any]:
    """Stripped text per row, as an object array ("" for missing)."""
    return np.asarray(_arrow_text(values).to_numpy(zero_copy_only=False), dtype=object)


def _arrow_text(values: Sequence[Any] | npt.NDArray[Any] | pd.Series) -> pa.Array:
    """Text cells as an Arrow string array, stripped, "" for missing."""
    try:
        arr = pa.array(values, type=pa.string(), from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError):  # not all str: take each one's text
        texts = ["" if v is None or v != v else str(v) for v in values]
        arr = pa.array(texts, type=pa.string())
    return pc.utf8_trim_whitespace(pc.fill_null(arr, ""))


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
    texts = [
        (r.decode("utf-8", errors="replace") if isinstance(r, bytes) else str(r)).rstrip("\r\n")[
            :RAW_MAX
        ]
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
