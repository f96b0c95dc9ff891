"""The rows a SQL window fetched → readings, quarantine rows and notes.

`SqlRows` converts the fetched columns: times to UTC with a status per row (`_times`),
values to SI per tag in the long (`_long`) or wide (`_wide`) layout, and each bad row to
the quarantine with its origin and "line" (`_place`). It builds on
`adapters.sql_table.SqlTable`, whose table name and settings it uses. The rules are
described in `adapters.sql_source`; the query that fetches the rows lives there too.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping
from datetime import datetime
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from adapters.source_tools import NONFINITE_REASON, parse_times, quality_good, readings_frame
from adapters.sql_table import SqlTable

__all__ = ["SqlRows"]

_OVERFLOW = "value too large: it overflows when converted to SI units"


class SqlRows(SqlTable):
    """The row conversion of `adapters.sql_source.SqlSource` (its settings below and in
    `SqlTable`; a quarantined row names the table by its `SqlTable.cursor_key`)."""

    quality_map: Mapping[str, bool]
    _si: dict[str, tuple[float, float]]

    def _times(self, raw: tuple[Any, ...]) -> tuple[pd.DatetimeIndex, npt.NDArray[np.int8]]:
        """UTC times and a status (0 ok, -1 ambiguous, else `TIME_REASONS` codes)."""
        # A long table repeats each instant once per tag: convert each distinct value once
        # (datetime objects convert one by one, in Python).
        codes, uniques = pd.factorize(pd.Series(raw, dtype=object), use_na_sentinel=True)
        utc, status = self._times_distinct(tuple(uniques))
        utc_ns = np.append(utc.asi8, np.iinfo(np.int64).min)[codes]  # -1 (NULL) → NaT
        status = np.append(status, np.int8(1))[codes]
        return pd.DatetimeIndex(utc_ns.view("datetime64[ns]")).tz_localize("UTC"), status

    def _times_distinct(
        self, raw: tuple[Any, ...]
    ) -> tuple[pd.DatetimeIndex, npt.NDArray[np.int8]]:
        sample = next((v for v in raw if v is not None), None)
        if isinstance(sample, str):  # a text column (SQLite without a declared type)
            return parse_times(list(raw), self.zone)
        status = np.zeros(len(raw), dtype=np.int8)
        if sample is not None and getattr(sample, "tzinfo", None) is not None:
            utc = pd.DatetimeIndex(pd.to_datetime(list(raw), utc=True)).as_unit("ns")
            status[utc.isna()] = 1
            return utc, status
        wall = pd.DatetimeIndex(pd.to_datetime(list(raw))).as_unit("ns")
        status[wall.isna()] = 1
        if self.zone.key == "UTC":
            return wall.tz_localize("UTC"), status
        local = wall.tz_localize(self.zone, ambiguous="NaT", nonexistent="NaT")
        as_dst = wall.tz_localize(self.zone, ambiguous=np.ones(len(wall), bool), nonexistent="NaT")
        lost = local.isna() & (status == 0)
        nonexistent = lost & as_dst.isna()
        status[nonexistent] = 3
        status[lost & ~nonexistent] = -1
        return local.tz_convert("UTC"), status

    def _long(
        self,
        columns: list[tuple[Any, ...]],
        times: pd.DatetimeIndex,
        keep: npt.NDArray[np.bool_],
        bad: list[tuple[str, int, str, Any]],
        notes: Counter[str],
    ) -> pd.DataFrame:
        tags = np.asarray(columns[1], dtype=object)
        values = _floats(columns[2])
        odd = keep & _nonfinite(columns[2], values)
        if odd.any():
            notes["nonfinite_values"] += int(odd.sum())
            for i in np.flatnonzero(odd):
                row = _row(columns, int(i))
                bad.append((*self._place(columns, int(i)), NONFINITE_REASON, repr(row)))
            keep = keep & ~odd
        blank = keep & ~np.isfinite(values)
        for i in np.flatnonzero(blank):
            row = (columns[0][i], columns[1][i], columns[2][i])
            reason = "blank value" if columns[2][i] is None else "value is not a number"
            bad.append((*self._place(columns, int(i)), reason, repr(row)))
        keep = keep & ~blank
        good = np.ones(len(tags), dtype=bool)
        if self.quality_column:
            good, unmapped = quality_good(columns[3], self.quality_map)
            notes["unmapped_quality"] += unmapped
        ids, uniques = pd.factorize(tags)
        scale = np.array([self._si[str(u)][0] for u in uniques])
        offset = np.array([self._si[str(u)][1] for u in uniques])
        with np.errstate(over="ignore", invalid="ignore"):
            si = values * scale[ids] + offset[ids]
        for i in np.flatnonzero(keep & ~np.isfinite(si)):
            bad.append((*self._place(columns, int(i)), _OVERFLOW, repr(_row(columns, int(i)))))
            keep = keep & (np.arange(len(keep)) != i)
        return readings_frame(times.asi8[keep], tags[keep], si[keep], good[keep])

    def _wide(
        self,
        columns: list[tuple[Any, ...]],
        tags: list[str],
        times: pd.DatetimeIndex,
        keep: npt.NDArray[np.bool_],
        bad: list[tuple[str, int, str, Any]],
        notes: Counter[str],
    ) -> pd.DataFrame:
        parts_t, parts_v, counts = [], [], []
        for j, tag in enumerate(tags, start=1):
            values = _floats(columns[j])
            odd = keep & _nonfinite(columns[j], values)
            if odd.any():  # NULL is "not sampled"; NaN and infinity are values gone wrong
                notes["nonfinite_values"] += int(odd.sum())
                reason = f"{NONFINITE_REASON}: {tag}"
                for i in np.flatnonzero(odd):
                    row = _row(columns, int(i))
                    bad.append((*self._place(columns, int(i)), reason, repr(row)))
            ok = keep & np.isfinite(values)
            scale, offset = self._si[tag]
            with np.errstate(over="ignore", invalid="ignore"):
                si = values * scale + offset
            for i in np.flatnonzero(ok & ~np.isfinite(si)):
                row = _row(columns, int(i))
                bad.append((*self._place(columns, int(i)), f"{_OVERFLOW}: {tag}", repr(row)))
            ok &= np.isfinite(si)
            parts_t.append(times.asi8[ok])
            parts_v.append(si[ok])
            counts.append(int(ok.sum()))
        names = np.repeat(np.array(tags, dtype=object), counts)
        return readings_frame(np.concatenate(parts_t), names, np.concatenate(parts_v), None)

    def _place(self, columns: list[tuple[Any, ...]], i: int) -> tuple[str, int]:
        """Quarantine origin and "line" of row *i*: a table has no line numbers, so the
        origin is the table (and tag, long layout) and the line the stored time as
        digits (YYYYMMDDhhmmss) — stable, so a re-read quarantines the same row again."""
        origin = f"{self.cursor_key}:{columns[1][i]}" if self.layout == "long" else self.cursor_key
        stamp = columns[0][i]
        line = int(stamp.strftime("%Y%m%d%H%M%S")) if isinstance(stamp, datetime) else 0
        return origin, line


def _nonfinite(raw: tuple[Any, ...], values: npt.NDArray[np.float64]) -> npt.NDArray[np.bool_]:
    """Cells that hold NaN or infinity (a stored float, or text that spells one), not NULL."""
    gone = ~np.isfinite(values)
    if not gone.any():
        return gone
    return gone & np.array(
        [v is not None and _spells_nonfinite(v) for v in raw], dtype=bool
    )


def _spells_nonfinite(value: Any) -> bool:
    if isinstance(value, float):
        return not math.isfinite(value)
    if isinstance(value, str):
        return value.strip().lower().lstrip("+-") in ("nan", "inf", "infinity")
    try:
        return not math.isfinite(float(value))  # Decimal('NaN') and the like
    except (TypeError, ValueError):
        return False


def _row(columns: list[tuple[Any, ...]], i: int) -> tuple[Any, ...]:
    """Row *i* of column tuples, for a quarantine row's raw text."""
    return tuple(col[i] for col in columns)


def _floats(values: tuple[Any, ...]) -> npt.NDArray[np.float64]:
    try:
        return np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError):  # text in a numeric column: what does not parse is NaN
        series = pd.to_numeric(pd.Series(values, dtype=object), errors="coerce")
        return series.to_numpy(dtype=np.float64, copy=True)

