"""Fuzzing the CSV reader: generated exports that mix good rows with bad ones.

Each generated file holds good rows (several timestamp spellings, quoted and spaced
cells, huge but representable numbers, empty cells) among bad lines (garbage, wrong field
counts, impossible timestamps, NaN and infinity, numbers that overflow in SI units,
unclosed quotes, stray delimiters, decimal commas, bytes that are not UTF-8, control
characters) and blank lines, in three dialects. The checks: nothing raises; every good
cell is a reading, value for value; every bad line is in the quarantine with its file,
line and a reason; nothing else is.

The bulk (10,000 cases, ``slow``) runs the chunk parser `CsvSource._parse` directly, the
function every batch goes through; a smaller run goes through `CsvSource.batches` on real
files (BOM, CRLF, chunking, ledger).

Unit factors: 1 bar = 1e5 Pa (SI Brochure, 9th ed., Table 8); 1 m3/h = 1/3600 m3/s
(definition of the hour). The NaN/infinity grouping (one quarantine row per tag and
chunk, with the count) is the rule stated in `adapters/csv_source.py`.
"""

from __future__ import annotations

import random
import re
import tempfile
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TypeVar

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from adapters.csv_source import CsvSource
from adapters.records import TagSpec
from tests.adapters.ingest_helpers import ingest, write

TAGS = [TagSpec("PT-100", "bar", "pressure"), TagSpec("FT-203", "m3/h", "flow")]
SCALE = {"PT-100": 1e5, "FT-203": 1 / 3600}
START = pd.Timestamp("2026-05-01", tz="UTC")
# (delimiter, decimal mark): the export dialects a plant produces (common practice)
DIALECTS = [(",", "."), (";", ","), ("\t", ".")]
T = TypeVar("T")
_NAN_GROUP = re.compile(r"^value is NaN/inf: ([\d,]+) cells? of (\S+)$")


@dataclass
class Case:
    """One generated export: its bytes and what a correct reader makes of them."""

    delimiter: str
    decimal: str
    lines: list[bytes] = field(default_factory=list)  # body lines, no line end
    good: list[tuple[pd.Timestamp, str, float]] = field(default_factory=list)  # SI values
    bad: set[int] = field(default_factory=set)  # body line index (0 = first body line)
    nonfinite: list[tuple[int, str]] = field(default_factory=list)  # (index, tag)

    def header(self) -> bytes:
        return self.delimiter.join(["timestamp", "PT-100", "FT-203"]).encode()


class Picker:
    """The choices a generated export is made of: drawn by hypothesis (which shrinks a
    failing case) or by a seeded `random.Random` (cheap, for the 10,000-case run)."""

    def __init__(self, draw: st.DrawFn | None = None, rng: random.Random | None = None) -> None:
        self.draw, self.rng = draw, rng
        self.span = 0  # [min] added to every time: exports read together never meet

    def choice(self, options: Sequence[T]) -> T:
        if self.draw is not None:
            return self.draw(st.sampled_from(options))
        assert self.rng is not None
        return self.rng.choice(options)

    def integer(self, lo: int, hi: int) -> int:
        if self.draw is not None:
            return self.draw(st.integers(lo, hi))
        assert self.rng is not None
        return self.rng.randint(lo, hi)

    def minutes(self) -> list[int]:
        if self.draw is not None:
            return self.draw(st.lists(st.integers(0, 50_000), min_size=1, max_size=25,
                                      unique=True))
        assert self.rng is not None
        return self.rng.sample(range(50_001), self.rng.randint(1, 25))

    def value(self) -> float:
        if self.draw is not None:
            return self.draw(_VALUES)
        assert self.rng is not None
        kind = self.rng.randrange(3)
        if kind == 0:
            return round(self.rng.uniform(-1e6, 1e6), 6)
        if kind == 1:
            return float(self.rng.randint(-10**6, 10**6))
        return self.rng.choice(_SPECIAL)

    def garbage(self) -> str:
        if self.draw is not None:
            return self.draw(_GARBAGE)
        assert self.rng is not None
        while True:
            text = "".join(self.rng.choice(_GARBAGE_ALPHABET)
                           for _ in range(self.rng.randint(1, 25)))
            if not _numberish(text):
                return text

    def permutation(self, n: int) -> list[int]:
        if self.draw is not None:
            return self.draw(st.permutations(range(n)))
        assert self.rng is not None
        order = list(range(n))
        self.rng.shuffle(order)
        return order


def _numberish(text: str) -> bool:
    """Text a reader may fairly take as a number, an empty cell, NaN or infinity."""
    word = text.strip().lower()
    return (re.fullmatch(r"[\s\d.,e+-]*", word) is not None
            or word in {"na", "n/a", "null", "none", "#n/a"}
            or word.lstrip("+-") in {"nan", "inf", "infinity"})


_SPECIAL = [0.0, -0.0, 1e-300, 1e300, -1e300, 1.5e-7]  # huge ones still fit in SI
_VALUES = st.one_of(
    st.floats(-1e6, 1e6, allow_nan=False).map(lambda v: round(v, 6)),
    st.integers(-10**6, 10**6).map(float),
    st.sampled_from(_SPECIAL),
)
# printable ASCII, accented and CJK letters, markup and control characters; never the
# delimiters, a quote, a line end or NUL (those make lines of other kinds below)
_GARBAGE_ALPHABET = [chr(c) for c in range(0x20, 0x7F) if chr(c) not in ',;"\t'] + list(
    "äöüßéçøΩ中文\u200b\ufeff\x01\x07\x1b\x7f")
_GARBAGE = st.text(alphabet=st.sampled_from(_GARBAGE_ALPHABET), min_size=1, max_size=25
                   ).filter(lambda s: not _numberish(s))
_ODD_TIMES = [
    "2026-13-01T00:00:00Z", "2026-02-30T00:00:00Z", "2026-05-01T25:00:00Z",
    "2026-05-01T00:00:00+25:00", "yesterday", "31/12/2026 10:00", "2026-05-01T00:61:00Z",
    "--", "T", "0000-00-00 00:00:00", "9999-12-31T23:59:59Z", "1677-09-21T00:00:00Z",
    "2262-04-12T00:00:00Z", "+002026-05-01T00:00:00Z", "2026-05-01T00:00:00ZZ", "1e9",
]


def _stamp(r: Picker, minute: int) -> tuple[str, pd.Timestamp]:
    when = START + pd.Timedelta(minutes=minute + r.span)
    form = r.choice(["z", "offset", "naive", "space", "fraction"])
    if form == "z":
        return when.strftime("%Y-%m-%dT%H:%M:%SZ"), when
    if form == "offset":  # the same instant written in UTC+02:00
        return (when + pd.Timedelta(hours=2)).strftime("%Y-%m-%dT%H:%M:%S+02:00"), when
    if form == "naive":  # naive: site zone, UTC here
        return when.strftime("%Y-%m-%dT%H:%M:%S"), when
    if form == "space":
        return when.strftime("%Y-%m-%d %H:%M:%S"), when
    return when.strftime("%Y-%m-%dT%H:%M:%S.250Z"), when + pd.Timedelta(milliseconds=250)


def _cell(r: Picker, value: float, decimal: str) -> str:
    text = r.choice([repr(value), f"{value:.17e}", f"{value:.17G}"])  # lossless spellings
    if decimal == ",":
        text = text.replace(".", ",")
    style = r.choice(["plain", "plain", "quoted", "spaced"])
    if style == "quoted":
        return f'"{text}"'
    if style == "spaced":
        return f" {text} "
    return text


def make_export(r: Picker) -> Case:
    delimiter, decimal = r.choice(DIALECTS)
    case = Case(delimiter, decimal)
    d = delimiter
    for minute in r.minutes():
        text, when = _stamp(r, minute)
        kind = r.choice(["good", "good", "good", "empty_cell", "bad_cell", "nan_cell", "overflow"])
        p, f = r.value(), r.value()
        pc, fc = _cell(r, p, decimal), _cell(r, f, decimal)
        index = len(case.lines)
        if kind == "empty_cell":  # an empty cell: not sampled, no reading, not bad
            case.lines.append(f"{text}{d}{pc}{d}".encode())
            case.good.append((when, "PT-100", p * SCALE["PT-100"]))
            continue
        if kind == "bad_cell":  # the pressure cell is garbage: the flow cell still counts
            junk = r.choice([b"\xff\xfe", b"<b>", r.garbage().encode()])
            case.lines.append(text.encode() + d.encode() + junk + f"{d}{fc}".encode())
            case.bad.add(index)
        elif kind == "nan_cell":
            word = r.choice(["nan", "NaN", "inf", "-inf", "Infinity"])
            case.lines.append(f"{text}{d}{word}{d}{fc}".encode())
            case.nonfinite.append((index, "PT-100"))
        elif kind == "overflow":  # 1e308 bar is a float, 1e313 Pa is not
            case.lines.append(f"{text}{d}1e308{d}{fc}".encode())
            case.bad.add(index)
        else:
            case.lines.append(f"{text}{d}{pc}{d}{fc}".encode())
            case.good.append((when, "PT-100", p * SCALE["PT-100"]))
        case.good.append((when, "FT-203", f * SCALE["FT-203"]))
        for _ in range(r.integer(0, 2)):
            _noise(r, case)
    order = r.permutation(len(case.lines))
    case.lines = [case.lines[i] for i in order]
    where = {old: new for new, old in enumerate(order)}
    case.bad = {where[i] for i in case.bad}
    case.nonfinite = sorted((where[i], tag) for i, tag in case.nonfinite)
    return case


@st.composite
def exports(draw: st.DrawFn) -> Case:
    return make_export(Picker(draw=draw))


def _noise(r: Picker, case: Case) -> None:
    d = case.delimiter
    text, _ = _stamp(r, r.integer(60_000, 70_000))  # never a good row's time
    kind = r.choice([
        "garbage", "short", "long", "odd_time", "blank", "unclosed_quote", "other_delimiter",
        "decimal_mark", "binary", "control", "blank_time",
    ])
    if kind == "blank":
        case.lines.append(r.choice([b"", b"  "]))
        return
    if kind == "garbage":
        line = r.garbage().encode()
    elif kind == "short":
        line = f"{text}{d}1".encode()
    elif kind == "long":
        line = f"{text}{d}1{d}2{d}3".encode()
    elif kind == "odd_time":
        line = f"{r.choice(_ODD_TIMES)}{d}1{d}2".encode()
    elif kind == "unclosed_quote":
        line = f'{text}{d}"1{d}2'.encode()
    elif kind == "other_delimiter":
        line = (";" if d != ";" else ",").join([text, "1", "2"]).encode()
    elif kind == "decimal_mark":
        # a decimal comma in a point-decimal export splits a cell; a point in a
        # comma-decimal export is no decimal mark there
        line = (f"{text}{d}1,5{d}2,5" if case.decimal == "." else f"{text}{d}1.5{d}2.5").encode()
    elif kind == "binary":
        line = text.encode() + d.encode() + b"\xff\xc3\x28" + d.encode() + b"\x80"
    elif kind == "control":
        line = f"{text}{d}\x01\x02{d}\x1b[2J".encode()
    else:  # blank time
        line = f"{d}1{d}2".encode()
    case.bad.add(len(case.lines))
    case.lines.append(line)


def _source(folder: Path | str, case: Case, chunk_rows: int = 200_000) -> CsvSource:
    return CsvSource(TAGS, path=folder, delimiter=case.delimiter, decimal=case.decimal,
                     settle_seconds=0, chunk_rows=chunk_rows)


def _check(case: Case, readings: pd.DataFrame, quarantined: pd.DataFrame, first: int) -> None:
    """*first*: the file line number of the first body line."""
    want = sorted((t.value, tag, v) for t, tag, v in case.good)
    have = sorted(zip(readings["time"].array.asi8.tolist(), readings["tag"].tolist(),
                      readings["value"].tolist(), strict=True))
    assert [(t, tag) for t, tag, _ in have] == [(t, tag) for t, tag, _ in want]
    assert [v for _, _, v in have] == pytest.approx([v for _, _, v in want], rel=1e-12,
                                                    abs=1e-300)
    origins, lines = quarantined["origin"].tolist(), quarantined["line"].tolist()
    reasons = quarantined["reason"].tolist()
    assert set(origins) <= {"a.csv"}
    assert all(reasons)
    own: set[int] = set()
    counted: Counter[str] = Counter()
    firsts = {i for i, _ in case.nonfinite}
    for line, reason in zip(lines, reasons, strict=True):
        group = _NAN_GROUP.match(reason)
        if group is None:
            own.add(line)  # every bad line has a row of its own ...
            continue
        # ... and NaN/infinity one row per tag and chunk at one of its cells, with the count
        counted[group.group(2)] += int(group.group(1).replace(",", ""))
        assert line - first in firsts
    assert own == {first + i for i in case.bad}
    assert counted == Counter(tag for _, tag in case.nonfinite)


_SOURCES = {dialect: CsvSource(TAGS, path=".", delimiter=dialect[0], decimal=dialect[1])
            for dialect in DIALECTS}


def _parse_once(case: Case) -> None:
    source = _SOURCES[(case.delimiter, case.decimal)]
    layout = source._layout(case.header())
    assert not isinstance(layout, str), layout
    data = b"".join(line + b"\n" for line in case.lines)
    readings, quarantined, _ = source._parse(data, 2, "a.csv", layout, {})
    _check(case, readings, quarantined, first=2)


def _joined(cases: list[Case]) -> Case:
    """Exports of one dialect read as one chunk, with the expectations of all of them."""
    out = Case(cases[0].delimiter, cases[0].decimal)
    for case in cases:
        base = len(out.lines)
        out.lines += case.lines
        out.good += case.good
        out.bad |= {base + i for i in case.bad}
        out.nonfinite += [(base + i, tag) for i, tag in case.nonfinite]
    return out


@pytest.mark.slow
def test_chunk_parser_10000_generated_exports() -> None:
    """10,000 exports from a fixed seed, eight of a dialect per chunk (the parser's cost
    is mostly per call: one call per export would take minutes); each export is checked
    for its own rows. A failure names the chunk to replay."""
    rng = random.Random(20260501)
    pending: dict[tuple[str, str], list[Case]] = {d: [] for d in DIALECTS}
    made = 0
    while made < 10_000:
        picker = Picker(rng=rng)
        picker.span = 100_000 * (made % 24)  # < 24 exports wait at a time
        case = make_export(picker)
        made += 1
        group = pending[(case.delimiter, case.decimal)]
        group.append(case)
        if len(group) == 8 or made == 10_000:
            for waiting in [g for g in pending.values() if g]:
                joined = _joined(waiting)
                try:
                    _parse_once(joined)
                except AssertionError as exc:
                    raise AssertionError(f"chunk ending at export {made}: {joined!r}") from exc
                waiting.clear()
    assert made == 10_000


@settings(max_examples=200, deadline=None, derandomize=True,
          suppress_health_check=list(HealthCheck))
@given(case=exports())
def test_chunk_parser_generated_exports(case: Case) -> None:
    _parse_once(case)


@settings(max_examples=300, deadline=None, derandomize=True,
          suppress_health_check=list(HealthCheck))
@given(case=exports(), bom=st.booleans(), eol=st.sampled_from([b"\n", b"\r\n"]))
def test_batches_of_generated_files(case: Case, bom: bool, eol: bytes) -> None:
    """Whole files through `CsvSource.batches` (one chunk: NaN groups are per chunk)."""
    data = (b"\xef\xbb\xbf" if bom else b"") + case.header() + eol
    data += b"".join(line + eol for line in case.lines)
    with tempfile.TemporaryDirectory() as tmp:
        write(Path(tmp) / "a.csv", data)
        got = ingest(_source(tmp, case), {})
    _check(case, got.readings, got.quarantined, first=2)
