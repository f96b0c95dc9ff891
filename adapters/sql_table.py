"""The historian table as the SQL source sees it: reflected, checked, and bounded in time.

`SqlTable._reflect` reflects the configured table and checks that the columns the
settings name exist (`SourceSettingError` names the setting; a wide table without a
configured tag's column raises `UnknownTagError`), so every name reaches SQL as a quoted
Column object. The other methods turn UTC instants into the time column's own bounds
(naive local wall time padded by `LOCAL_PAD`) and back, and find the table's time span.
The rules are described in `adapters.sql_source`, whose `SqlSource` inherits them.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import pandas as pd
import sqlalchemy as sa

from adapters.base import BranchwatchAdapterError, UnknownTagError
from adapters.records import TagSpec

__all__ = ["LOCAL_PAD", "SourceSettingError", "SqlTable"]

# Padding of a window when the column holds local wall time: wider than any UTC offset
# change (DST moves the clock by one hour, a few zones by two), then filtered exactly.
LOCAL_PAD = timedelta(hours=3)
_PROBE = 100  # distinct text times looked at from each end for one that reads as a time


class SourceSettingError(BranchwatchAdapterError, ValueError):
    """A [source] setting does not match the database (a table or column that does not
    exist); *setting* is its key path in the site file, e.g. ``source.table``."""

    def __init__(self, setting: str, message: str) -> None:
        super().__init__(f"{setting}: {message}")
        self.setting = setting


class SqlTable:
    """The table reading of `adapters.sql_source.SqlSource` (its settings below)."""

    tags: dict[str, TagSpec]
    name: str
    table_name: str
    schema: str | None
    layout: str
    time_column: str
    tag_column: str
    value_column: str
    quality_column: str | None
    zone: ZoneInfo
    where: str
    _table: sa.Table | None

    @property
    def cursor_key(self) -> str:
        """The key of this table's watermark in the store."""
        return f"{self.schema}.{self.table_name}" if self.schema else self.table_name

    def _reflect(self, conn: sa.Connection) -> sa.Table:
        if self._table is not None:
            return self._table
        try:
            table = sa.Table(self.table_name, sa.MetaData(), schema=self.schema, autoload_with=conn)
        except sa.exc.NoSuchTableError:
            raise SourceSettingError(
                "source.table",
                f"table {self.cursor_key!r} does not exist at {self.where}; check the spelling "
                "(and [source] schema)",
            ) from None
        wanted = [("time_column", self.time_column)]
        if self.layout == "long":
            wanted += [("tag_column", self.tag_column), ("value_column", self.value_column)]
            if self.quality_column:
                wanted.append(("quality_column", self.quality_column))
        for arg, col in wanted:
            if col not in table.c:
                raise SourceSettingError(
                    f"source.{arg}",
                    f"table {self.cursor_key!r} has no column {col!r}; "
                    f"it has {sorted(table.c.keys())}",
                )
        if self.layout == "wide":
            for tag in self.tags:
                if tag not in table.c:
                    raise UnknownTagError(tag, f"{self.name} ({self.cursor_key})")
        self._table = table
        return table

    def _aware(self, table: sa.Table) -> bool:
        return bool(getattr(table.c[self.time_column].type, "timezone", False))

    def _to_db(self, table: sa.Table, when: datetime, pad: timedelta) -> datetime:
        """A UTC instant as the column stores it (naive local wall time, padded)."""
        when = when.astimezone(UTC)
        if self._aware(table):
            return when
        if self.zone.key == "UTC":
            return when.replace(tzinfo=None)
        return (when + pad).astimezone(self.zone).replace(tzinfo=None)

    def _span(
        self, conn: sa.Connection
    ) -> tuple[pd.Timestamp | None, pd.Timestamp | None, pd.Timestamp | None]:
        """(oldest, newest) padded for local wall time, and the newest row's own time (a
        repeated wall time read as daylight time: the earlier instant)."""
        table = self._reflect(conn)
        t = table.c[self.time_column]
        query = sa.select(sa.func.min(t), sa.func.max(t))
        if self.layout == "long":
            query = query.where(table.c[self.tag_column].in_(list(self.tags)))
        low, high = conn.execute(query).one()
        if low is None:
            return None, None, None
        if isinstance(low, str) or isinstance(high, str):  # a text column may hold garbage
            low, high = self._readable_end(conn, query, t, t.asc()), \
                self._readable_end(conn, query, t, t.desc())
            if low is None or high is None:
                return None, None, None
        pad = timedelta(0) if self._aware(table) or self.zone.key == "UTC" else LOCAL_PAD
        last = self._utc_bound(high, timedelta(0))
        return self._utc_bound(low, -pad), self._utc_bound(high, pad), last

    def _next(self, conn: sa.Connection, after: pd.Timestamp) -> pd.Timestamp | None:
        table = self._reflect(conn)
        t = table.c[self.time_column]
        bound = self._to_db(table, after.to_pydatetime(), -LOCAL_PAD)
        query = sa.select(sa.func.min(t)).where(t >= bound)
        if self.layout == "long":
            query = query.where(table.c[self.tag_column].in_(list(self.tags)))
        low = conn.execute(query).scalar()
        if isinstance(low, str):
            low = self._readable_end(conn, query, t, t.asc())
        return None if low is None else self._utc_bound(low, -LOCAL_PAD)

    def _readable_end(
        self, conn: sa.Connection, query: sa.Select[Any], t: Any, order: Any
    ) -> Any:
        """The first value of a text time column, in *order*, that reads as a time (a
        text that is no time sorts anywhere and must not set the span); None if the
        first `_PROBE` distinct values all fail."""
        probe = sa.select(t).distinct()
        if query.whereclause is not None:
            probe = probe.where(query.whereclause)
        for (value,) in conn.execute(probe.where(t.is_not(None)).order_by(order).limit(_PROBE)):
            try:
                pd.Timestamp(value)
            except (ValueError, TypeError, OverflowError):
                continue
            return value
        return None

    def _utc_bound(self, value: Any, pad: timedelta) -> pd.Timestamp:
        """A DB time as UTC, moved by *pad* when it is local wall time (may be ambiguous)."""
        stamp = pd.Timestamp(value)
        if stamp.tzinfo is not None:
            return stamp.tz_convert("UTC")
        if self.zone.key == "UTC":
            return stamp.tz_localize("UTC")
        return (
            (stamp + pad)
            .tz_localize(self.zone, ambiguous=True, nonexistent="shift_forward")
            .tz_convert("UTC")
        )

