"""CSV source: layouts, units, time zones, the file ledger, chunking and resume.

Unit factors are exact by definition: 1 bar = 1e5 Pa (SI Brochure, 9th ed., Table 8);
1 m3/h = 1/3600 m3/s (definition of the hour); t/°C = (t/°F − 32)·5/9 (definition of the
Fahrenheit scale). DST dates for America/Chicago come from the IANA tz database (US rule
since 2007: second Sunday of March 02:00 → 03:00, first Sunday of November 02:00 → 01:00).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from adapters.base import SourceUnavailable, source_class
from adapters.csv_source import CsvSource
from adapters.records import TagSpec
from adapters.units import UnitError
from tests.adapters.ingest_helpers import canonical, ingest, reasons, write

TAGS = [
    TagSpec("PT-100", "bar", "pressure"),
    TagSpec("FT-203", "m3/h", "flow"),
    TagSpec("TT-100", "degF", "temperature"),
]


def utc(text: str) -> pd.Timestamp:
    return pd.Timestamp(text, tz="UTC")


def values(frame: pd.DataFrame, tag: str) -> list[float]:
    return canonical(frame).loc[lambda f: f["tag"] == tag, "value"].tolist()


def times(frame: pd.DataFrame, tag: str) -> list[pd.Timestamp]:
    return canonical(frame).loc[lambda f: f["tag"] == tag, "time"].tolist()


def test_alias_registers_the_class() -> None:
    assert source_class("csv") is CsvSource


def test_wide_file_converts_each_tag_to_si(tmp_path: Path) -> None:
    write(
        tmp_path / "a.csv",
        "timestamp,PT-100,FT-203,TT-100\n"
        "2026-05-01T00:00:00Z,2.5,360,68\n"
        "2026-05-01T00:01:00Z,2.6,,212\n",
    )
    got = ingest(CsvSource(TAGS, path=tmp_path, settle_seconds=0), {})
    assert values(got.readings, "PT-100") == [250_000.0, 260_000.0]  # 1 bar = 1e5 Pa
    assert values(got.readings, "FT-203") == pytest.approx([0.1])  # 360 m3/h = 0.1 m3/s
    assert values(got.readings, "TT-100") == pytest.approx([20.0, 100.0])  # °F scale
    assert got.readings["good"].all()
    assert list(got.readings.dtypes.astype(str)) == [
        "datetime64[ns, UTC]",
        "object",
        "float64",
        "bool",
    ]
    assert got.quarantined.empty


def test_long_file_maps_quality_codes(tmp_path: Path) -> None:
    write(
        tmp_path / "a.csv",
        "timestamp,tag,value,quality\n"
        "2026-05-01T00:00:00Z,PT-100,2,G\n"
        "2026-05-01T00:00:00Z,FT-203,36,192\n"
        "2026-05-01T00:01:00Z,PT-100,2,BAD\n"
        "2026-05-01T00:01:00Z,FT-203,36,\n"
        "2026-05-01T00:02:00Z,FT-203,36,Uncertain\n",
    )
    got = ingest(CsvSource(TAGS, path=tmp_path, settle_seconds=0), {})
    good = canonical(got.readings)["good"].tolist()
    assert good == [True, True, True, False, False]  # sorted by (time, tag)
    assert got.notes["unmapped_quality"] == 2  # "BAD" and "Uncertain" are not in the map
    custom = CsvSource(TAGS, path=tmp_path, settle_seconds=0, quality_map={"uncertain": True})
    assert canonical(ingest(custom, {}).readings)["good"].tolist()[-1]


def test_semicolon_and_decimal_comma(tmp_path: Path) -> None:
    write(tmp_path / "eu.csv", "Zeitstempel;PT-100;FT-203\n2026-05-01 02:00:00;1,25;18,5\n")
    src = CsvSource(
        TAGS, path=tmp_path, delimiter=";", decimal=",", timezone="Europe/Berlin", settle_seconds=0
    )
    got = ingest(src, {})
    assert values(got.readings, "PT-100") == [125_000.0]
    assert values(got.readings, "FT-203") == pytest.approx([18.5 / 3600])
    # Berlin is UTC+2 in summer (CEST), IANA tz database
    assert times(got.readings, "PT-100") == [utc("2026-05-01 00:00")]


def test_offsets_and_z_are_exact(tmp_path: Path) -> None:
    write(
        tmp_path / "a.csv",
        "timestamp,PT-100\n2026-05-01T01:00:00+01:00,1\n2026-05-01T00:01:00Z,1\n"
        "2026-04-30T19:02:00-05:00,1\n",
    )
    got = ingest(CsvSource(TAGS, path=tmp_path, timezone="Asia/Tokyo", settle_seconds=0), {})
    assert times(got.readings, "PT-100") == [
        utc("2026-05-01 00:00"),
        utc("2026-05-01 00:01"),
        utc("2026-05-01 00:02"),
    ]


def test_fall_back_repeated_hour_follows_file_order(tmp_path: Path) -> None:
    write(
        tmp_path / "a.csv",
        "timestamp,PT-100\n2026-11-01 00:30,1\n2026-11-01 01:00,2\n2026-11-01 01:30,3\n"
        "2026-11-01 01:00,4\n2026-11-01 01:30,5\n2026-11-01 02:00,6\n",
    )
    got = ingest(CsvSource(TAGS, path=tmp_path, timezone="America/Chicago", settle_seconds=0), {})
    # CDT = UTC-5 before the change, CST = UTC-6 after it (IANA tz database)
    assert times(got.readings, "PT-100") == [
        utc("2026-11-01 05:30"),
        utc("2026-11-01 06:00"),
        utc("2026-11-01 06:30"),
        utc("2026-11-01 07:00"),
        utc("2026-11-01 07:30"),
        utc("2026-11-01 08:00"),
    ]
    assert values(got.readings, "PT-100") == [v * 1e5 for v in range(1, 7)]


def test_fall_back_rule_survives_a_chunk_boundary_and_a_restart(tmp_path: Path) -> None:
    write(
        tmp_path / "a.csv",
        "timestamp,PT-100\n2026-11-01 01:00,1\n2026-11-01 01:30,2\n"
        "2026-11-01 01:00,3\n2026-11-01 01:30,4\n",
    )
    cursors: dict[str, dict[str, Any]] = {}
    one = ingest(
        CsvSource(TAGS, path=tmp_path, timezone="America/Chicago", settle_seconds=0, chunk_rows=1),
        cursors,
        limit=2,
    )
    rest = ingest(
        CsvSource(TAGS, path=tmp_path, timezone="America/Chicago", settle_seconds=0, chunk_rows=1),
        cursors,
    )
    both = pd.concat([one.readings, rest.readings], ignore_index=True)
    assert times(both, "PT-100") == [
        utc("2026-11-01 06:00"),
        utc("2026-11-01 06:30"),
        utc("2026-11-01 07:00"),
        utc("2026-11-01 07:30"),
    ]


def test_spring_forward_missing_hour_is_quarantined(tmp_path: Path) -> None:
    write(
        tmp_path / "a.csv",
        "timestamp,PT-100\n2026-03-08 01:59,1\n2026-03-08 02:30,2\n2026-03-08 03:00,3\n",
    )
    got = ingest(CsvSource(TAGS, path=tmp_path, timezone="America/Chicago", settle_seconds=0), {})
    assert times(got.readings, "PT-100") == [utc("2026-03-08 07:59"), utc("2026-03-08 08:00")]
    assert reasons(got.quarantined) == {3: "nonexistent local time"}


def test_same_file_twice_yields_nothing_new(tmp_path: Path) -> None:
    write(tmp_path / "a.csv", "timestamp,PT-100\n2026-05-01T00:00:00Z,1\n")
    src = CsvSource(TAGS, path=tmp_path, settle_seconds=0)
    cursors: dict[str, dict[str, Any]] = {}
    assert len(ingest(src, cursors).readings) == 1
    again = ingest(src, cursors)
    assert again.batches == 0 and again.readings.empty
    assert cursors["a.csv"]["complete_sha256"] == cursors["a.csv"]["sha256_prefix"]


def test_grown_file_is_read_from_where_it_stopped(tmp_path: Path) -> None:
    path = write(tmp_path / "a.csv", "timestamp,PT-100\n2026-05-01T00:00:00Z,1\n2026-05-01T00:01")
    src = CsvSource(TAGS, path=tmp_path, settle_seconds=0)
    cursors: dict[str, dict[str, Any]] = {}
    first = ingest(src, cursors)
    assert len(first.readings) == 1 and first.notes["unterminated_last_line"] == 1
    write(path, path.read_bytes() + b":00Z,2\n2026-05-01T00:02:00Z,3\n")
    second = ingest(src, cursors)
    assert values(second.readings, "PT-100") == [2e5, 3e5]
    assert second.notes.get("file_changed", 0) == 0
    assert cursors["a.csv"]["line"] == 4


def test_changed_prefix_is_read_again_and_flagged(tmp_path: Path) -> None:
    path = write(tmp_path / "a.csv", "timestamp,PT-100\n2026-05-01T00:00:00Z,1\n")
    src = CsvSource(TAGS, path=tmp_path, settle_seconds=0)
    cursors: dict[str, dict[str, Any]] = {}
    ingest(src, cursors)
    write(path, "timestamp,PT-100\n2026-05-01T00:00:00Z,7\n2026-05-01T00:01:00Z,8\n")
    again = ingest(src, cursors)
    assert again.notes["file_changed"] == 1
    assert values(again.readings, "PT-100") == [7e5, 8e5]


def test_copy_of_a_read_file_is_not_read_again(tmp_path: Path) -> None:
    text = "timestamp,PT-100\n2026-05-01T00:00:00Z,1\n"
    write(tmp_path / "a.csv", text)
    src = CsvSource(TAGS, path=tmp_path, settle_seconds=0)
    cursors: dict[str, dict[str, Any]] = {}
    ingest(src, cursors)
    write(tmp_path / "b.csv", text)
    again = ingest(src, cursors)
    assert again.readings.empty and again.notes["duplicate_file"] == 1
    assert "b.csv" in cursors


def test_file_still_being_written_is_skipped(tmp_path: Path) -> None:
    write(tmp_path / "a.csv", "timestamp,PT-100\n2026-05-01T00:00:00Z,1\n", age=0.0)
    cursors: dict[str, dict[str, Any]] = {}
    got = ingest(CsvSource(TAGS, path=tmp_path, settle_seconds=30), cursors)
    assert got.readings.empty and got.notes["files_unsettled"] == 1
    assert cursors["a.csv"] == {}
    later = ingest(CsvSource(TAGS, path=tmp_path, settle_seconds=0), cursors)
    assert len(later.readings) == 1


def test_multi_chunk_file_resumes_after_a_kill(tmp_path: Path) -> None:
    rows = "".join(f"2026-05-01T{i // 60:02d}:{i % 60:02d}:00Z,{i / 10},{i}\n" for i in range(500))
    write(tmp_path / "a.csv", "timestamp,PT-100,FT-203\n" + rows)
    full = ingest(CsvSource(TAGS, path=tmp_path, settle_seconds=0, chunk_rows=100), {})
    assert full.batches > 5 and len(full.readings) == 1000
    cursors: dict[str, dict[str, Any]] = {}
    killed = ingest(
        CsvSource(TAGS, path=tmp_path, settle_seconds=0, chunk_rows=100), cursors, limit=1
    )
    assert 0 < len(killed.readings) < 1000
    resumed = ingest(CsvSource(TAGS, path=tmp_path, settle_seconds=0, chunk_rows=100), cursors)
    both = pd.concat([killed.readings, resumed.readings], ignore_index=True)
    assert not both.duplicated(["time", "tag"]).any()  # no double
    pd.testing.assert_frame_equal(canonical(both), canonical(full.readings))  # no loss


def test_unit_that_does_not_convert_fails_at_construction(tmp_path: Path) -> None:
    with pytest.raises(UnitError, match="FT-203"):
        CsvSource([TagSpec("FT-203", "bar", "flow")], path=tmp_path)


@pytest.mark.parametrize(
    ("option", "value"),
    [("layout", "diagonal"), ("decimal", ";"), ("timezone", "Mars/Base"), ("chunk_rows", 0)],
)
def test_bad_options_name_the_argument(tmp_path: Path, option: str, value: Any) -> None:
    with pytest.raises(ValueError, match=option):
        CsvSource(TAGS, path=tmp_path, **{option: value})


def test_missing_folder(tmp_path: Path) -> None:
    src = CsvSource(TAGS, path=tmp_path / "nowhere")
    with pytest.raises(SourceUnavailable, match="nowhere"):
        list(src.batches({}))
    assert "does not exist" in src.check()[0]


def test_check_names_tags_missing_from_the_newest_file(tmp_path: Path) -> None:
    write(tmp_path / "a.csv", "timestamp,PT-100,FT-203\n2026-05-01T00:00:00Z,1,2\n")
    assert CsvSource(TAGS, path=tmp_path).check() == [
        "configured tag 'TT-100' does not appear in a.csv"
    ]
    write(tmp_path / "a.csv", "timestamp,tag,value\n2026-05-01T00:00:00Z,TT-100,1\n")
    assert len(CsvSource(TAGS, path=tmp_path).check()) == 2


def test_file_without_usable_header_is_quarantined_once(tmp_path: Path) -> None:
    write(tmp_path / "a.csv", "just one column\n1\n2\n")
    src = CsvSource(TAGS, path=tmp_path, settle_seconds=0)
    cursors: dict[str, dict[str, Any]] = {}
    got = ingest(src, cursors)
    assert got.notes["bad_header"] == 1 and reasons(got.quarantined)[1].startswith("no usable")
    assert ingest(src, cursors).batches == 0


def test_header_with_another_delimiter_names_the_setting(tmp_path: Path) -> None:
    # A ';' export dropped into a ','-configured inbox: the reason says which setting.
    write(tmp_path / "a.csv", "timestamp;PT-100;FT-203\n2026-05-01T00:00:00Z;1;2\n")
    got = ingest(CsvSource(TAGS, path=tmp_path, settle_seconds=0), {})
    reason = reasons(got.quarantined)[1]
    assert reason.startswith("no usable header line") and "delimiter = ';'" in reason, reason


def test_a_file_refused_for_its_header_is_read_once_the_setting_is_fixed(
    tmp_path: Path,
) -> None:
    # issue 12: after setting the delimiter the hint named, 'ingest' read 0 readings: the
    # refused file had been marked as read
    write(tmp_path / "a.csv", "timestamp;PT-100;FT-203\n2026-05-01T00:00:00Z;1;2\n")
    cursors: dict[str, dict[str, Any]] = {}
    first = ingest(CsvSource(TAGS, path=tmp_path, settle_seconds=0), cursors)
    assert first.notes["bad_header"] == 1 and first.readings.empty
    same = ingest(CsvSource(TAGS, path=tmp_path, settle_seconds=0), cursors)
    assert same.batches == 0  # unchanged file, unchanged settings: not tried again
    fixed = CsvSource(TAGS, path=tmp_path, settle_seconds=0, delimiter=";")
    got = ingest(fixed, cursors)
    assert sorted(got.readings["tag"]) == ["FT-203", "PT-100"]
    assert ingest(fixed, cursors).batches == 0  # and then it is read, once
