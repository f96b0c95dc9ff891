"""Fuzzing the SQL source's row handling: generated fetched rows, long and wide.

`SqlSource._window` turns the rows a query fetched into readings and quarantine rows
(times through `_times`, values through `_floats` / `_long` / `_wide`, all four in
`adapters/sql_rows.py`). The bulk (10,000 cases, ``slow``) feeds it generated row tuples
directly, with the database query replaced by the generated rows; a smaller run writes
generated rows to a real SQLite table and reads them through `SqlSource.batches`. Column
types are one per case, as a database column has one: naive or aware datetimes, text
(SQLite without a declared type), floats, Decimals, integers or text values; NULL, NaN
and infinity, text that is not a number and numbers that overflow in SI units are mixed
in.

Checks: nothing raises; every good row is a reading, value for value; every bad row is
one quarantine row naming the table (and tag), with a reason; nothing else is. The rules
checked are those of the module doc of `adapters/sql_source.py` (NULL in a wide row is
"not sampled"; NaN/inf one row each). 1 bar = 1e5 Pa (SI Brochure, 9th ed., Table 8);
1 m3/h = 1/3600 m3/s.
"""

from __future__ import annotations

import math
import random
import tempfile
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from decimal import Decimal
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from adapters.records import TagSpec
from adapters.sql_source import SqlSource
from tests.adapters.ingest_helpers import ingest

TAGS = [TagSpec("PT-100", "bar", "pressure"), TagSpec("FT-203", "m3/h", "flow")]
SCALE = {"PT-100": 1e5, "FT-203": 1 / 3600}
T0 = datetime(2026, 6, 1, tzinfo=UTC)
SPAN = timedelta(days=1)


@dataclass
class Rows:
    """Generated fetched rows and what a correct source makes of them."""

    layout: str
    kinds: tuple[str, str] = ("", "")  # (time column, value column)
    rows: list[tuple[Any, ...]] = field(default_factory=list)
    good: list[tuple[datetime, str, float]] = field(default_factory=list)
    bad: list[str] = field(default_factory=list)  # expected origin of each bad row
    untimed: list[str] = field(default_factory=list)  # the same, of rows without a time


def _time(rng: random.Random, kind: str, seconds: int) -> tuple[Any, datetime | None]:
    """A time cell of column *kind* and the UTC instant it means (None: not a time)."""
    when = T0 + timedelta(seconds=seconds)
    if rng.random() < 0.08:
        return None, None
    if kind == "naive":
        return when.replace(tzinfo=None), when
    if kind == "aware":
        return when.astimezone(rng.choice([UTC, _PLUS2])), when
    if rng.random() < 0.15:
        return rng.choice(["not a time", "2026-13-01 00:00:00", "", "9999-99-99",
                           "2026-06-01T25:00:00Z", "x' OR '1'='1"]), None
    return rng.choice([when.strftime("%Y-%m-%d %H:%M:%S.%f"), when.isoformat()]), when


_PLUS2 = __import__("datetime").timezone(timedelta(hours=2))


def _value(rng: random.Random, kind: str) -> tuple[Any, float | None, str]:
    """A value cell of column *kind*: (cell, the number it holds, "ok"|"null"|"nonfinite"|
    "text"|"overflow")."""
    roll = rng.random()
    if roll < 0.08:
        return None, None, "null"
    if roll < 0.14:
        odd = rng.choice([float("nan"), float("inf"), float("-inf")])
        if kind == "text":
            return rng.choice(["NaN", "inf", "-Infinity", " nan "]), None, "nonfinite"
        if kind == "decimal":
            return Decimal(rng.choice(["NaN", "Infinity", "-Infinity"])), None, "nonfinite"
        return odd, None, "nonfinite"
    if roll < 0.18 and kind == "text":
        return rng.choice(["", "abc", "1,5", "12 bar", "0x1F", "--", "<b>1</b>"]), None, "text"
    if roll < 0.21:
        big = rng.choice([1e308, -1e308, 1.7e308])
        return (str(big) if kind == "text" else Decimal(big) if kind == "decimal" else big,
                big, "overflow")
    number = rng.choice([round(rng.uniform(-1e6, 1e6), 6), float(rng.randint(-10**6, 10**6)),
                         0.0, 1e-300, 1e300])
    if kind == "text":
        return rng.choice([repr(number), f" {number!r} ", f"{number:.17e}"]), number, "ok"
    if kind == "decimal":
        return Decimal(repr(number)), number, "ok"
    if kind == "integer":
        return int(number), float(int(number)), "ok"
    return number, number, "ok"


def _cell(rng: random.Random, kind: str, tag: str) -> tuple[Any, float | None, str]:
    raw, number, state = _value(rng, kind)
    if state == "overflow" and number is not None and math.isfinite(number * SCALE[tag]):
        state = "ok"  # 1e308 m3/h is 2.8e304 m3/s: huge, but a number
    return raw, number, state


def make_rows(rng: random.Random, table: str = "hist") -> Rows:
    layout = rng.choice(["long", "wide"])
    tkind = rng.choice(["naive", "aware", "text"])
    vkind = rng.choice(["float", "decimal", "integer", "text"])
    out = Rows(layout, (tkind, vkind))
    seconds = rng.sample(range(86_400), rng.randint(1, 30))
    for s in seconds:
        cell, when = _time(rng, tkind, s)
        if layout == "long":
            for tag in rng.sample(["PT-100", "FT-203"], rng.randint(1, 2)):
                raw, number, state = _cell(rng, vkind, tag)
                out.rows.append((cell, tag, raw))
                if when is None:
                    out.untimed.append(f"{table}:{tag}")
                elif state != "ok":
                    out.bad.append(f"{table}:{tag}")
                else:
                    assert number is not None
                    out.good.append((when, tag, number * SCALE[tag]))
            continue
        cells, bad_tags = [], 0
        for tag in ("PT-100", "FT-203"):
            raw, number, state = _cell(rng, vkind, tag)
            cells.append(raw)
            if when is not None and state == "ok" and number is not None:
                out.good.append((when, tag, number * SCALE[tag]))
            elif when is not None and state in ("nonfinite", "overflow"):
                bad_tags += 1  # one row per bad cell; NULL and text: not sampled
        out.rows.append((cell, *cells))
        if when is None:
            out.untimed.append(table)
        out.bad += [table] * bad_tags
    rng.shuffle(out.rows)
    return out


def _source(layout: str, url: str = "sqlite://", table: str = "hist") -> SqlSource:
    return SqlSource(TAGS, url=url, table=table, layout=layout,
                     time_column="t", tag_column="tag", value_column="v", backoff_seconds=0.0)


_SOURCES = {layout: _source(layout) for layout in ("long", "wide")}


def _check(case: Rows, readings: Any, quarantined: Any, *, fetched_untimed: bool = True
           ) -> None:
    """*fetched_untimed*: rows without a readable time were fetched (a query for a
    window cannot select them: a NULL or garbage time lies in no window)."""
    want = sorted((t.timestamp(), tag, v) for t, tag, v in case.good)
    have = sorted(zip((t.timestamp() for t in readings["time"]), readings["tag"],
                      readings["value"], strict=True))
    assert [(t, tag) for t, tag, _ in have] == [(t, tag) for t, tag, _ in want]
    assert [v for *_, v in have] == pytest.approx([v for *_, v in want], rel=1e-12, abs=1e-300)
    bad = case.bad + case.untimed if fetched_untimed else case.bad
    assert sorted(quarantined["origin"]) == sorted(bad)
    assert all(quarantined["reason"].str.len() > 0)


def _window_once(case: Rows) -> None:
    source = _SOURCES[case.layout]
    source._run = lambda what, work: (None, case.rows)  # type: ignore[method-assign]
    readings, quarantined, _ = source._window(["PT-100", "FT-203"], T0, T0 + SPAN)
    _check(case, readings, quarantined)


@pytest.mark.slow
def test_row_handling_10000_generated_fetches() -> None:
    """10,000 generated fetches from a fixed seed, eight of one layout and column types
    handled in one call (the cost is mostly per call); each is checked for its own rows.
    A failure names the batch to replay."""
    rng = random.Random(20260601)
    pending: dict[tuple[str, tuple[str, str]], list[Rows]] = {}
    made = 0
    while made < 10_000:
        case = make_rows(rng)
        made += 1
        group = pending.setdefault((case.layout, case.kinds), [])
        group.append(case)
        if len(group) < 8 and made < 10_000:
            continue
        for waiting in [g for g in pending.values() if g] if made == 10_000 else [group]:
            joined = Rows(waiting[0].layout, waiting[0].kinds)
            for one in waiting:
                joined.rows += one.rows
                joined.good += one.good
                joined.bad += one.bad
                joined.untimed += one.untimed
            try:
                _window_once(joined)
            except AssertionError as exc:
                raise AssertionError(f"fetch batch ending at {made}: {joined!r}") from exc
            waiting.clear()
    assert made == 10_000


@settings(max_examples=150, deadline=None, derandomize=True,
          suppress_health_check=list(HealthCheck))
@given(seed=st.integers(0, 2**32 - 1))
def test_row_handling_generated_fetches(seed: int) -> None:
    _window_once(make_rows(random.Random(seed)))


def _stored(cell: Any) -> Any:
    """A cell as SQLite keeps it: datetimes as ISO text, Decimals as text, and NaN as the
    text "NaN" (SQLite turns a NaN float into NULL)."""
    if isinstance(cell, datetime):
        return cell.isoformat()
    if isinstance(cell, Decimal):
        return str(cell)
    if isinstance(cell, float) and cell != cell:
        return "NaN"
    if isinstance(cell, int) and abs(cell) >= 2**63:  # beyond SQLite's INTEGER
        return float(cell)
    return cell


@settings(max_examples=100, deadline=None, derandomize=True,
          suppress_health_check=list(HealthCheck))
@given(seed=st.integers(0, 2**32 - 1))
def test_generated_rows_through_a_sqlite_table(seed: int) -> None:
    """Rows written to a SQLite table of untyped columns (each cell keeps what was
    written), read through `SqlSource.batches`. Times with mixed UTC offsets in a text
    column are left out: the database compares them as text, so a window cannot select
    them by instant (a limit of text time columns, stated in the report)."""
    rng = random.Random(seed)
    case = make_rows(rng)
    while case.kinds[0] == "aware":  # text with offsets does not sort by time: see below
        case = make_rows(rng)
    names = ["t", "tag", "v"] if case.layout == "long" else ["t", "PT-100", "FT-203"]
    rows = [tuple(_stored(c) for c in row) for row in case.rows]
    with tempfile.TemporaryDirectory() as tmp:
        url = f"sqlite:///{Path(tmp) / 'plant.db'}"
        engine = sa.create_engine(url)
        with engine.begin() as conn:
            conn.exec_driver_sql("CREATE TABLE hist (" + ", ".join(f'"{n}"' for n in names) + ")")
            conn.exec_driver_sql("INSERT INTO hist VALUES (?, ?, ?)", rows)
        engine.dispose()
        source = _source(case.layout, url)
        source.start = T0
        try:
            got = ingest(source, {})
        finally:
            source.close()
    # a text that is no time may sort inside the window (it is then quarantined) or not
    timed = ~got.quarantined["reason"].isin(["unparseable timestamp", "blank timestamp"])
    _check(case, got.readings, got.quarantined[timed], fetched_untimed=False)
