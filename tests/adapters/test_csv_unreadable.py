"""Files the CSV source cannot read never stop an ingest; links are not followed; NaN/inf
cells and unknown columns are accounted for in a few grouped rows.

The rule under test is DESIGN §5 ("bad rows are quarantined with a reason, counted in the
report, and never stop the run"; "the same file ingested twice changes nothing"), applied
to whole files. The site is the example site (config/example-site.toml); its header
pressure PT-100 is logged in bar (1 bar = 1e5 Pa, SI Brochure, 9th ed., Table 8) and its
supply temperature TT-100 in °C. Data are invented.
"""

from __future__ import annotations

import gzip
import tomllib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
import sqlalchemy as sa

from adapters import csv_source
from adapters.base import ResultsStore, open_store
from adapters.csv_chunks import MAX_LINE_BYTES
from adapters.csv_source import CsvSource
from adapters.records import TagSpec
from monitor.app.demo import EXAMPLE_SITE
from monitor.app.ingest import IngestSummary, ingest, open_source
from monitor.site.config import ConfigError, Site, parse_site
from tests.adapters.ingest_helpers import ingest as ingest_batches
from tests.adapters.ingest_helpers import write

T0 = pd.Timestamp("2026-05-01", tz="UTC")
TAGS = [TagSpec("PT-100", "bar", "pressure"), TagSpec("TT-100", "degC", "temperature")]


def good_export(minutes: range) -> str:
    rows = [f"{(T0 + pd.Timedelta(minutes=m)).isoformat()},3.{m % 10},21.5\n" for m in minutes]
    return "timestamp,PT-100,TT-100\n" + "".join(rows)


def make_site(tmp_path: Path, **source: Any) -> Site:
    doc = tomllib.loads(EXAMPLE_SITE.read_text())
    doc["store"] = {"url": f"sqlite:///{tmp_path / 'store.db'}"}
    doc["source"] = {"kind": "csv", "path": "inbox", "settle_seconds": "0 s", **source}
    (tmp_path / "inbox").mkdir(exist_ok=True)
    return parse_site(doc, path=tmp_path / "site.toml")


@pytest.fixture
def site(tmp_path: Path) -> Site:
    return make_site(tmp_path)


@pytest.fixture
def store(site: Site) -> Iterator[ResultsStore]:
    opened = open_store(site.store_url)
    yield opened
    opened.close()


def run(site: Site, store: ResultsStore) -> IngestSummary:
    source = open_source(site)
    try:
        return ingest(site, store, source)
    finally:
        source.close()


def quarantine(store: ResultsStore) -> pd.DataFrame:
    engine: sa.Engine = store.engine  # type: ignore[attr-defined]
    with engine.connect() as conn:
        rows = conn.execute(sa.text("SELECT origin, line, reason, raw FROM quarantine")).all()
    return pd.DataFrame(rows, columns=["origin", "line", "reason", "raw"])


def stored_minutes(store: ResultsStore, tag: str = "PT-100") -> list[int]:
    end = T0 + pd.Timedelta(days=1)
    got = store.read_readings([tag], T0.to_pydatetime(), end.to_pydatetime())
    return sorted(int((t - T0) / pd.Timedelta(minutes=1)) for t in got["time"])


# --------------------------------------------------------------------------- item 1 and 2
def test_poisoned_files_between_good_ones(site: Site, store: ResultsStore) -> None:
    inbox = site.path.parent / "inbox"
    write(inbox / "a_good.csv", good_export(range(0, 10)))
    # one 3 MiB line: a header line no CSV export has (the 60 MB case, smaller)
    write(inbox / "b_huge.csv", "timestamp,PT-100," + "9" * (3 << 20) + "\n")
    # a compressed export dropped unpacked-named: binary bytes (gzip header has NULs)
    write(inbox / "c_binary.csv", gzip.compress(good_export(range(100, 110)).encode(), mtime=0))
    write(inbox / "d_good.csv", good_export(range(10, 20)))

    first = run(site, store)
    assert stored_minutes(store) == list(range(20))  # both good files, every row
    q = quarantine(store).set_index("origin")
    assert set(q.index) == {"b_huge.csv", "c_binary.csv"}
    assert q.loc["b_huge.csv", "reason"] == (
        f"line 1 is longer than {MAX_LINE_BYTES:,} bytes: not a CSV export with one record per line"
    )
    # item 2: a binary file is called what it is, not a delimiter problem
    assert q.loc["c_binary.csv", "reason"].startswith("not a text CSV file: NUL byte")
    assert "delimiter" not in " ".join(q["reason"])
    assert "\x00" not in " ".join(q["raw"])  # PostgreSQL text refuses NUL (common practice)
    assert first.notes["files_quarantined"] == 2 and first.quarantined == 2

    second = run(site, store)  # raises nothing, adds nothing
    assert (second.stored, second.quarantined, second.batches) == (0, 0, 0)
    assert len(quarantine(store)) == 2

    # a file that changes is looked at again
    write(inbox / "b_huge.csv", good_export(range(30, 35)))
    third = run(site, store)
    assert third.stored == 5 * 2 and stored_minutes(store)[-5:] == list(range(30, 35))


def test_too_long_line_after_good_lines_keeps_them(tmp_path: Path) -> None:
    text = good_export(range(5)) + "2026-05-01T00:05:00Z," + "1" * (2 * MAX_LINE_BYTES)
    write(tmp_path / "a.csv", text)
    source = CsvSource(TAGS, path=tmp_path, settle_seconds=0,
                       chunk_rows=2)
    cursors: dict[str, dict[str, Any]] = {}
    got = ingest_batches(source, cursors)
    assert len(got.readings) == 10  # the five good lines before it are delivered (2 tags)
    assert got.quarantined["line"].tolist() == [7]  # header is line 1, good lines 2..6
    assert got.quarantined["reason"].iloc[0].startswith("line 7 is longer than")
    assert cursors["a.csv"]["quarantined"].startswith("line 7")
    again = ingest_batches(source, cursors)
    assert again.batches == 0


@pytest.mark.parametrize("chunk_rows", [2, 200_000])  # the line across chunks, or in one
def test_too_long_line_with_an_end_is_one_bad_line(tmp_path: Path, chunk_rows: int) -> None:
    huge = "2026-05-01T00:05:00Z," + "1" * (2 * MAX_LINE_BYTES) + "\n"
    after = "".join(f"2026-05-01T00:{m:02d}:00Z,3,20\n" for m in range(6, 9))
    write(tmp_path / "a.csv", good_export(range(5)) + huge + after)
    source = CsvSource(TAGS, path=tmp_path, settle_seconds=0, chunk_rows=chunk_rows)
    cursors: dict[str, dict[str, Any]] = {}
    got = ingest_batches(source, cursors)
    assert len(got.readings) == (5 + 3) * 2  # every good line, before and after it
    assert got.quarantined[["line", "reason"]].values.tolist() == [
        [7, f"line longer than {MAX_LINE_BYTES:,} bytes: not a CSV record"]
    ]
    assert len(got.quarantined["raw"].iloc[0]) <= 200  # raw text kept short
    assert got.notes["long_lines"] == 1
    assert "quarantined" not in cursors["a.csv"]  # the file itself is fine
    assert ingest_batches(source, cursors).batches == 0


def test_field_over_the_csv_module_limit_is_one_bad_line(tmp_path: Path) -> None:
    # Python's csv module refuses fields over csv.field_size_limit(), 131,072 by default
    # (Python documentation, csv module); a wrong field count sends the chunk to it.
    long_field = "x" * 200_000
    text = good_export(range(3)) + f'2026-05-01T00:03:00Z,"{long_field}",1\n' + "a,b\n"
    write(tmp_path / "a.csv", text)
    got = ingest_batches(CsvSource(TAGS, path=tmp_path,
                                   settle_seconds=0), {})
    assert len(got.readings) == 6  # three good lines of 2 tags
    reasons = dict(zip(got.quarantined["line"], got.quarantined["reason"], strict=True))
    assert reasons[5].startswith("line cannot be split: field larger than field limit")
    assert reasons[6] == "expected 3 fields, found 2"


def test_utf16_and_non_utf8_headers_are_not_text_csv(tmp_path: Path) -> None:
    write(tmp_path / "a.csv", good_export(range(2)).encode("utf-16"))
    write(tmp_path / "b.csv", "zeit,PT-100 Druck \xb0\n".encode("latin-1") + b"x,1\n")
    got = ingest_batches(CsvSource(TAGS, path=tmp_path,
                                   settle_seconds=0), {})
    reasons = dict(zip(got.quarantined["origin"], got.quarantined["reason"], strict=True))
    assert reasons == {
        "a.csv": "not a text CSV file: it is UTF-16 text (export the file as UTF-8)",
        "b.csv": "not a text CSV file: its header line is not UTF-8 text (export the file "
                 "as UTF-8)",
    }


def test_permission_denied_and_vanished_files(
    site: Site, store: ResultsStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    inbox = site.path.parent / "inbox"
    for name, minutes in (("a.csv", range(3)), ("b.csv", range(3, 6)), ("c.csv", range(6, 9))):
        write(inbox / name, good_export(minutes))
    real_open = open

    def fake_open(path: Any, *args: Any, **kwargs: Any) -> Any:
        # the test runs as root in CI, where chmod 000 does not deny: refuse like the OS
        if Path(path).name == "a.csv":
            raise PermissionError(13, "Permission denied", str(path))
        if Path(path).name == "b.csv":
            Path(path).unlink()  # the export job moves the file away as it is opened
        return real_open(path, *args, **kwargs)

    monkeypatch.setattr(csv_source, "open", fake_open, raising=False)
    summary = run(site, store)
    q = quarantine(store).set_index("origin")["reason"].to_dict()
    assert q == {
        "a.csv": "file cannot be opened: permission denied (check the export job's file mode)",
        "b.csv": "file vanished while it was being read",
    }
    assert stored_minutes(store) == [6, 7, 8] and summary.quarantined == 2
    assert run(site, store).batches == 0  # the denied file is not retried until it changes
    monkeypatch.undo()
    (inbox / "a.csv").chmod(0o644)  # the mode is fixed: its status-change time moves
    assert run(site, store).stored == 3 * 2 and stored_minutes(store) == [0, 1, 2, 6, 7, 8]


# --------------------------------------------------------------------------- item 3
def test_nan_and_inf_cells_are_quarantined_not_dropped(tmp_path: Path) -> None:
    wide = (
        "timestamp,PT-100,TT-100\n"
        "2026-05-01T00:00:00Z,NaN,20\n"
        "2026-05-01T00:01:00Z,inf,\n"  # empty TT-100: not sampled, no note
        "2026-05-01T00:02:00Z,3,-Infinity\n"
        "2026-05-01T00:03:00Z,3,nan\n"
    )
    long = (
        "timestamp,tag,value\n"
        "2026-05-01T00:00:00Z,PT-100,nan\n"
        "2026-05-01T00:01:00Z,PT-100,3\n"
        "2026-05-01T00:02:00Z,TT-100,+inf\n"
    )
    write(tmp_path / "w.csv", wide)
    write(tmp_path / "l.csv", long)
    got = ingest_batches(CsvSource(TAGS, path=tmp_path, settle_seconds=0), {})
    rows = sorted(zip(got.quarantined["origin"], got.quarantined["line"],
                      got.quarantined["reason"], strict=True))
    assert rows == [
        ("l.csv", 2, "value is NaN/inf: 1 cell of PT-100"),
        ("l.csv", 4, "value is NaN/inf: 1 cell of TT-100"),
        ("w.csv", 2, "value is NaN/inf: 2 cells of PT-100"),
        ("w.csv", 4, "value is NaN/inf: 2 cells of TT-100"),
    ]
    assert got.notes["nonfinite_values"] == 6
    # the finite cells arrive: w 00:00 TT, 00:02 PT, 00:03 PT; l 00:01 PT
    assert sorted(got.readings["value"].tolist()) == [20.0, 3e5, 3e5, 3e5]


def test_nan_text_cells_on_the_slow_path_too(tmp_path: Path) -> None:
    # a cell that is not a number sends the column to the text parser: same rule there
    write(tmp_path / "w.csv", "timestamp,PT-100\n2026-05-01T00:00:00Z,NaN\n"
          "2026-05-01T00:01:00Z,oops\n2026-05-01T00:02:00Z,NA\n2026-05-01T00:03:00Z,2\n")
    got = ingest_batches(CsvSource(TAGS, path=tmp_path,
                                   settle_seconds=0), {})
    assert dict(zip(got.quarantined["line"], got.quarantined["reason"], strict=True)) == {
        2: "value is NaN/inf: 1 cell of PT-100",
        3: "value of PT-100 is not a number",
    }  # "NA" is a no-value marker: not sampled, like an empty cell
    assert got.readings["value"].tolist() == [2e5]


# --------------------------------------------------------------------------- item 4
def test_ten_thousand_column_file_gives_one_row_and_a_short_summary(
    site: Site, store: ResultsStore
) -> None:
    names = [f"A{i}" for i in range(1, 10_000)]
    header = "timestamp,PT-100," + ",".join(names) + "\n"
    rows = "".join(f"2026-05-01T00:0{m}:00Z,3," + ",".join(["1"] * len(names)) + "\n"
                   for m in range(3))
    write(site.path.parent / "inbox" / "wide.csv", header + rows)
    summary = run(site, store)
    q = quarantine(store)
    assert q["reason"].tolist() == [
        "9,999 columns are not configured tags: A1, A2, A3 … (9,996 more)"
    ]
    assert summary.stored == 3 and summary.notes["unknown_tag_columns"] == 9_999
    assert len(str(summary.to_json_dict())) < 1_000  # was ~400,000 characters


def test_many_unknown_tags_in_a_long_file_give_one_row(tmp_path: Path) -> None:
    lines = "".join(f"2026-05-01T00:00:00Z,X-{i:04d},1\n" for i in range(50))
    write(tmp_path / "l.csv", "timestamp,tag,value\n" + lines + "2026-05-01T00:00:00Z,PT-100,1\n")
    got = ingest_batches(CsvSource(TAGS, path=tmp_path,
                                   settle_seconds=0), {})
    assert got.quarantined["reason"].tolist() == [
        "50 tags are not configured tags (50 rows): X-0000, X-0001, X-0002 … (47 more)"
    ]
    assert got.notes["unknown_tag_rows"] == 50 and len(got.readings) == 1


def test_summary_lists_at_most_ten_reasons(site: Site, store: ResultsStore) -> None:
    # fifteen files, each quarantining a row of its own unknown tag: fifteen reasons
    inbox = site.path.parent / "inbox"
    for i in range(15):
        write(inbox / f"f{i:02d}.csv", f"timestamp,tag,value\n2026-05-01T00:00:00Z,XX-{i},1\n")
    summary = run(site, store)
    assert summary.quarantined == 15
    assert len(summary.quarantine_reasons) == 11  # ten, and the rest summed
    assert summary.quarantine_reasons["other reasons (5 kinds)"] == 5
    assert sum(summary.quarantine_reasons.values()) == 15


# --------------------------------------------------------------------------- item 5
def test_symlinks_are_not_followed(tmp_path: Path) -> None:
    secret = tmp_path / "outside" / "secret.csv"
    secret.parent.mkdir()
    write(secret, "root:x:0:0:root:/root:/bin/bash\n2026-05-01T00:00:00Z,1\n")
    inbox = tmp_path / "inbox"
    (inbox / "day").mkdir(parents=True)
    write(inbox / "day" / "real.csv", good_export(range(2)))
    (inbox / "passwd.csv").symlink_to("/etc/passwd")
    (inbox / "linked").symlink_to(secret.parent, target_is_directory=True)
    (inbox / "day" / "twin.csv").symlink_to(inbox / "day" / "real.csv")
    source = CsvSource(TAGS, path=inbox, settle_seconds=0,
                       pattern="*/*.csv")
    top = CsvSource(TAGS, path=inbox, settle_seconds=0)
    cursors: dict[str, dict[str, Any]] = {}
    got = ingest_batches(source, cursors)
    got_top = ingest_batches(top, cursors)
    assert len(got.readings) == 4  # day/real.csv only: 2 lines of 2 tags
    everything = pd.concat([got.quarantined, got_top.quarantined], ignore_index=True)
    assert sorted(everything["origin"]) == ["day/twin.csv", "linked", "passwd.csv"]
    assert set(everything["reason"]) == {
        "symbolic link: not followed (the inbox reads real files only)"
    }
    assert not everything["raw"].str.contains("root").any()  # nothing of a target is read
    assert got.notes["symlinks_skipped"] == 2 and got_top.notes["symlinks_skipped"] == 1
    assert ingest_batches(source, cursors).batches == 0  # noted once
    assert any("not followed" in p for p in top.check())


@pytest.mark.parametrize("pattern", ["../*.csv", "day/../../*.csv", "/etc/*", "~/x/*.csv"])
def test_pattern_must_stay_inside_the_inbox(tmp_path: Path, pattern: str) -> None:
    with pytest.raises(ConfigError, match=r"source\.pattern: must (be relative|stay inside)"):
        make_site(tmp_path, pattern=pattern)
    with pytest.raises(ValueError, match="pattern must"):
        CsvSource([], path=tmp_path, pattern=pattern)


def test_pattern_error_is_one_line(tmp_path: Path) -> None:
    with pytest.raises(ConfigError) as err:
        make_site(tmp_path, pattern="../*.csv")
    assert "\n" not in str(err.value) and "site.toml" in str(err.value)
