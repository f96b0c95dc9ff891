"""Bad input to the CSV source: nothing crashes, every good row arrives, every bad row is
accounted for with its reason. Hand-written cases first, then a property-based test
(hypothesis) that mixes good rows with every kind of bad line at random places.

Unit factors: 1 bar = 1e5 Pa (SI Brochure, 9th ed., Table 8); 1 m3/h = 1/3600 m3/s.
"""

from __future__ import annotations

import tempfile
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from adapters.csv_source import CsvSource
from adapters.records import TagSpec
from adapters.units import UnitError
from tests.adapters.ingest_helpers import canonical, ingest, reasons, write

TAGS = [TagSpec("PT-100", "bar", "pressure"), TagSpec("FT-203", "m3/h", "flow")]
HEADER = "timestamp,PT-100,FT-203\n"


def source(folder: Path, **options: Any) -> CsvSource:
    return CsvSource(TAGS, path=folder, settle_seconds=0, **options)


def test_garbage_lines_and_wrong_types(tmp_path: Path) -> None:
    write(
        tmp_path / "a.csv",
        HEADER + "2026-05-01T00:00:00Z,1,3.6\n"
        "#### export interrupted ####\n"
        "2026-05-01T00:01:00Z,oops,7.2\n"
        "2026-05-01T00:02:00Z,1,2,3,4\n"
        "not a time,1,1\n"
        "2026-05-01T00:03:00Z,1.5,10.8\n",
    )
    got = ingest(source(tmp_path), {})
    assert reasons(got.quarantined) == {
        3: "expected 3 fields, found 1",
        4: "value of PT-100 is not a number",
        5: "expected 3 fields, found 5",
        6: "unparseable timestamp",
    }
    # line 4 keeps its good flow cell: no good value of a row is lost
    assert len(got.readings) == 5
    assert got.notes["quarantined"] == 4
    assert got.quarantined.loc[1, "raw"] == "2026-05-01T00:01:00Z,oops,7.2"


def test_unclosed_quote_loses_no_following_line(tmp_path: Path) -> None:
    write(
        tmp_path / "a.csv",
        HEADER + '2026-05-01T00:00:00Z,"1,3.6\n2026-05-01T00:01:00Z,2,7.2\n'
        "2026-05-01T00:02:00Z,3,10.8\n",
    )
    got = ingest(source(tmp_path), {})
    assert reasons(got.quarantined) == {2: "expected 3 fields, found 2"}
    assert len(got.readings) == 4


def test_blank_and_duplicate_timestamps_and_out_of_order_rows(tmp_path: Path) -> None:
    write(
        tmp_path / "a.csv",
        HEADER + "2026-05-01T00:02:00Z,3,3.6\n"
        "2026-05-01T00:00:00Z,1,3.6\n"
        ",9,9\n"
        "2026-05-01T00:01:00Z,2,3.6\n"
        "2026-05-01T00:01:00Z,2.5,3.6\n",
    )
    got = ingest(source(tmp_path), {})
    assert reasons(got.quarantined) == {4: "blank timestamp"}
    pressure = canonical(got.readings).query("tag == 'PT-100'")["value"].tolist()
    assert pressure == [1e5, 2.5e5, 3e5]  # duplicate 00:01 keeps the last row
    assert got.notes["duplicate_rows"] == 2  # one per tag of the repeated row
    assert got.notes["out_of_order_rows"] >= 1


def test_bom_crlf_blank_lines(tmp_path: Path) -> None:
    text = "\ufeff" + HEADER + "\n2026-05-01T00:00:00Z,1,3.6\n   \n2026-05-01T00:01:00Z,2,7.2\n"
    write(tmp_path / "a.csv", text.replace("\n", "\r\n"))
    got = ingest(source(tmp_path), {})
    assert len(got.readings) == 4 and got.quarantined.empty
    assert got.notes["blank_lines"] == 2


def test_empty_file_and_header_only(tmp_path: Path) -> None:
    write(tmp_path / "a.csv", b"")
    write(tmp_path / "b.csv", HEADER)
    cursors: dict[str, dict[str, Any]] = {}
    got = ingest(source(tmp_path), cursors)
    assert got.readings.empty and got.quarantined.empty
    assert got.notes["empty_file"] == 1
    assert ingest(source(tmp_path), cursors).batches == 0


def test_truncated_last_line_waits_for_its_newline(tmp_path: Path) -> None:
    path = write(tmp_path / "a.csv", HEADER + "2026-05-01T00:00:00Z,1,3.6\n2026-05-01T00:01:00Z,2")
    cursors: dict[str, dict[str, Any]] = {}
    first = ingest(source(tmp_path), cursors)
    assert len(first.readings) == 2 and first.quarantined.empty
    write(path, path.read_bytes() + b",7.2\n")
    second = ingest(source(tmp_path), cursors)
    assert canonical(second.readings)["value"].tolist() == pytest.approx([0.002, 2e5])


def test_unknown_tags(tmp_path: Path) -> None:
    write(tmp_path / "w.csv", "timestamp,PT-100,XX-1\n2026-05-01T00:00:00Z,1,5\n")
    write(
        tmp_path / "l.csv",
        "timestamp,tag,value\n2026-05-01T00:00:00Z,XX-1,5\n2026-05-01T00:01:00Z,XX-1,6\n"
        "2026-05-01T00:00:00Z,PT-100,1\n",
    )
    got = ingest(source(tmp_path), {})
    assert len(got.readings) == 2
    by_file = dict(zip(got.quarantined["origin"], got.quarantined["reason"], strict=True))
    assert by_file == {
        "w.csv": "1 column is not a configured tag: XX-1",
        "l.csv": "unknown tag 'XX-1' (2 rows in this chunk)",
    }
    assert got.notes["unknown_tag_rows"] == 2 and got.notes["unknown_tag_columns"] == 1


def test_long_rows_without_value_or_tag(tmp_path: Path) -> None:
    write(
        tmp_path / "a.csv",
        "timestamp,tag,value\n2026-05-01T00:00:00Z,PT-100,\n2026-05-01T00:00:00Z,,1\n"
        "2026-05-01T00:00:00Z,FT-203,x\n2026-05-01T00:00:00Z,FT-203,3.6\n",
    )
    got = ingest(source(tmp_path), {})
    assert reasons(got.quarantined) == {
        2: "blank value",
        3: "blank tag",
        4: "value is not a number",
    }
    assert len(got.readings) == 1


def test_unit_that_does_not_convert() -> None:
    with pytest.raises(UnitError, match=r"PT-100.*'m3/h'"):
        CsvSource([TagSpec("PT-100", "m3/h", "pressure")], path=".")


# --------------------------------------------------------------------------- property
_GARBAGE = st.text(
    alphabet=st.characters(min_codepoint=33, max_codepoint=126, exclude_characters=',"'),
    min_size=1,
    max_size=30,
)


@st.composite
def messy_file(draw: st.DrawFn) -> tuple[str, list[tuple[int, float, float | None]], set[int]]:
    """(file text, good rows as (minute, bar, m3/h or None), line numbers of bad lines)."""
    minutes = draw(st.lists(st.integers(0, 10_000), min_size=1, max_size=40, unique=True))
    numbers = st.floats(-1e6, 1e6, allow_nan=False).map(lambda v: round(v, 6))
    good: list[tuple[int, float, float | None]] = []
    lines: list[tuple[str, str]] = []  # (kind, text)
    for m in minutes:
        stamp = (pd.Timestamp("2026-05-01", tz="UTC") + pd.Timedelta(minutes=m)).isoformat()
        kind = draw(st.sampled_from(["good", "good", "good", "bad_cell", "no_flow"]))
        p = draw(numbers)
        f = draw(numbers)
        if kind == "bad_cell":  # pressure cell is text: the flow cell still counts
            lines.append(("bad", f"{stamp},{draw(_GARBAGE.filter(_not_number))},{f!r}"))
            good.append((m, float("nan"), f))
        elif kind == "no_flow":
            lines.append(("good", f"{stamp},{p!r},"))
            good.append((m, p, None))
        else:
            lines.append(("good", f"{stamp},{p!r},{f!r}"))
            good.append((m, p, f))
        for _ in range(draw(st.integers(0, 1))):
            noise = draw(
                st.one_of(
                    _GARBAGE.map(lambda g: ("bad", g)),
                    st.just(("bad", ",1,2")),
                    _GARBAGE.map(lambda g: ("bad", f"{g},1,2,3")),
                    st.just(("blank", "")),
                )
            )
            lines.append(noise)
    order = draw(st.permutations(range(len(lines))))
    lines = [lines[i] for i in order]
    bad = {i + 2 for i, (kind, _) in enumerate(lines) if kind == "bad"}  # header is line 1
    eol = draw(st.sampled_from(["\n", "\r\n"]))
    bom = draw(st.sampled_from(["", "\ufeff"]))
    text = bom + HEADER.rstrip("\n") + eol + "".join(t + eol for _, t in lines)
    return text, good, bad


def _not_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return text.strip().lower() not in {"nan", "na", "n/a", "null", "none", "#n/a", "-nan"}
    return False


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(case=messy_file(), chunk_rows=st.sampled_from([1, 7, 200_000]))
def test_every_good_row_arrives_and_every_bad_line_is_accounted(
    case: tuple[str, list[tuple[int, float, float | None]], set[int]], chunk_rows: int
) -> None:
    text, good, bad = case
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        write(folder / "a.csv", text)
        got = ingest(source(folder, chunk_rows=chunk_rows), {})
    start = pd.Timestamp("2026-05-01", tz="UTC")
    expected = [
        (start + pd.Timedelta(minutes=m), "PT-100", p * 1e5) for m, p, _ in good if p == p
    ] + [(start + pd.Timedelta(minutes=m), "FT-203", f / 3600) for m, _, f in good if f is not None]
    want = canonical(pd.DataFrame(expected, columns=["time", "tag", "value"]))
    have = canonical(got.readings)
    assert have["time"].tolist() == want["time"].tolist()
    assert have["tag"].tolist() == want["tag"].tolist()
    assert have["value"].to_numpy() == pytest.approx(want["value"].to_numpy(), rel=1e-12, abs=1e-12)
    assert set(got.quarantined["line"]) == bad
    assert got.quarantined["reason"].str.len().min() > 0 if bad else got.quarantined.empty
