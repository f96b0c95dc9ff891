"""Historian corrections end to end: a re-export that corrects stored readings, under each
``[source] corrections`` policy, on the demo site (invented data, two days at 10-minute
steps): ingest, analyse, ingest the re-export, catch up or analyse again.

With ``apply`` exactly the window the corrected readings fall in is fitted again, and the
store's fits are then those of a store that had the corrected export from the start.
"""

from __future__ import annotations

import json
import os
import shutil
import time
from collections.abc import Iterator
from datetime import timedelta
from pathlib import Path

import pandas as pd
import pytest

from adapters.base import ResultsStore, open_store
from monitor.app.cli import main
from monitor.app.demo import DEMO_START, prepare_demo
from monitor.app.ingest import ingest, open_source
from monitor.app.jobs import analyze, catch_up
from monitor.site.config import Site, load_site

DAYS = 2
START = DEMO_START - timedelta(days=1)
END = DEMO_START + timedelta(days=DAYS + 1)
DAY_FILE = "cw-loopB_20260402.csv"  # local day 2 April: the window 04-01 22:00Z .. 04-02 22:00Z
WINDOW = (pd.Timestamp("2026-04-01T22:00Z"), pd.Timestamp("2026-04-02T22:00Z"))
#: data lines of DAY_FILE corrected (09:30 .. 09:50 site time), and the branch flow changed
LINES = (58, 59, 60)
TAG = "FT-110"


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo site's folder, exports not yet ingested (copied by each test)."""
    paths = prepare_demo(tmp_path_factory.mktemp("corrections") / "site", days=DAYS,
                         step_s=600.0)
    return paths.folder


def _corrected_text(original: str) -> str:
    """The day's export as the historian issued it again: three readings of FT-110 raised
    by 4 % (a meter re-scaled after its calibration), every other byte the same."""
    lines = original.splitlines(keepends=True)
    column = lines[0].rstrip("\r\n").split(",").index(TAG)
    for n in LINES:
        cells = lines[n].rstrip("\r\n").split(",")
        cells[column] = f"{float(cells[column]) * 1.04:.2f}"
        lines[n] = ",".join(cells) + "\n"
    return "".join(lines)


def _settled(path: Path) -> None:
    """Older than [source] settle_seconds: the ingest reads it now."""
    past = time.time() - 3600
    os.utime(path, (past, past))


def _copy(demo: Path, dest: Path, policy: str) -> Site:
    shutil.copytree(demo, dest)
    site_file = dest / "site.toml"
    text = site_file.read_text()
    assert 'corrections = "refuse"' in text
    site_file.write_text(text.replace('corrections = "refuse"', f'corrections = "{policy}"'))
    return load_site(site_file)


class Run:
    """A site with its store and source open."""

    def __init__(self, site: Site) -> None:
        self.site = site
        self.store: ResultsStore = open_store(site.store_url)
        self.source = open_source(site)

    def close(self) -> None:
        self.source.close()
        self.store.close()

    def fits(self) -> pd.DataFrame:
        return self.store.read_fits().sort_values(
            ["branch", "window_start"], ignore_index=True)


@pytest.fixture
def runs() -> Iterator[list[Run]]:
    opened: list[Run] = []
    yield opened
    for r in opened:
        r.close()


def _reissue(site: Site) -> Path:
    inbox = site.path.parent / "inbox"
    again = inbox / "cw-loopB_20260402_reissued.csv"
    again.write_text(_corrected_text((inbox / DAY_FILE).read_text()))
    _settled(again)
    return again


def _in_window(fits: pd.DataFrame) -> pd.Series:
    return (fits["window_start"] == WINDOW[0]) & (fits["window_end"] == WINDOW[1])


def test_apply_refits_exactly_the_corrected_window(
    demo: Path, tmp_path: Path, runs: list[Run], capsys: pytest.CaptureFixture[str]
) -> None:
    run = Run(_copy(demo, tmp_path / "applied", "apply"))
    runs.append(run)
    ingest(run.site, run.store, run.source)
    first = analyze(run.site, run.store, run.source, START, END)
    assert first.refitted == 0 and first.corrections == 0
    before = run.fits()

    _reissue(run.site)
    summary = ingest(run.site, run.store, run.source)
    assert (summary.stored, summary.corrections_applied, summary.corrections_refused) == (
        0, 3, 0)
    assert summary.to_json_dict()["corrections_applied"] == 3
    journal = run.store.read_corrections()
    assert journal["tag"].tolist() == [TAG] * 3 and (journal["action"] == "applied").all()
    assert journal["new_value"].tolist() == pytest.approx(
        (journal["old_value"] * 1.04).tolist(), abs=0.006 / 3600)  # 0.01 m3/h of rounding
    assert journal["origin"].str.endswith("cw-loopB_20260402_reissued.csv").all()
    assert run.store.correction_counts() == {"applied": 3, "refused": 0, "pending": 3}

    assert main(["status", str(run.site.path), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["corrections"] == {
        "applied": 3, "refused": 0, "pending": 3}

    # the daemon's daily job: nothing new to analyse, one window to fit again
    caught = catch_up(run.site, run.store, run.source, now=END)
    assert (caught.windows, caught.refitted, caught.corrections) == (0, 1, 3)
    assert run.store.correction_counts()["pending"] == 0
    after = run.fits()
    assert len(after) == len(before)  # the window's fits replaced, none added
    window = _in_window(after)
    assert window.sum() == len(run.site.branches)
    changed = after["computed_at"] != before["computed_at"]
    assert (changed == window).all()  # exactly that window was fitted again
    b1 = window & (after["branch"] == "B1-reactor")
    assert after.loc[b1, "sum_y"].iloc[0] != before.loc[b1, "sum_y"].iloc[0]

    # a second catch-up has nothing left to fit again
    assert catch_up(run.site, run.store, run.source, now=END).refitted == 0
    assert main(["status", str(run.site.path)]) == 0
    assert "corrected readings: 3 applied (0 waiting" in capsys.readouterr().out

    # the fits equal those of a store that had the corrected export from the start
    fresh = Run(_copy(demo, tmp_path / "fresh", "refuse"))
    runs.append(fresh)
    day = fresh.site.path.parent / "inbox" / DAY_FILE
    day.write_text(_corrected_text(day.read_text()))
    _settled(day)
    ingest(fresh.site, fresh.store, fresh.source)
    analyze(fresh.site, fresh.store, fresh.source, START, END)
    pd.testing.assert_frame_equal(after.drop(columns="computed_at"),
                                  fresh.fits().drop(columns="computed_at"))
    keys = ["branch", "kind", "start"]
    assert (run.store.read_findings()[keys].sort_values(keys).values.tolist()
            == fresh.store.read_findings()[keys].sort_values(keys).values.tolist())


@pytest.mark.parametrize("period", ["later", "same"])
def test_analyze_refits_the_corrected_window_once(
    demo: Path, tmp_path: Path, runs: list[Run], period: str
) -> None:
    run = Run(_copy(demo, tmp_path / "site", "apply"))
    runs.append(run)
    ingest(run.site, run.store, run.source)
    analyze(run.site, run.store, run.source, START, END)
    n_fits = len(run.fits())
    _reissue(run.site)
    ingest(run.site, run.store, run.source)
    # 'analyze' of a later period fits the corrected window too; of a period that holds
    # the window, fits it once, as one of the period's
    span = (END, END + timedelta(days=2)) if period == "later" else (START, END)
    later = analyze(run.site, run.store, run.source, *span)
    assert (later.refitted, later.corrections) == (1, 3)
    assert later.windows == (1 if period == "later" else 3)
    refits = 1 if period == "later" else 0  # beside the period's own windows
    assert later.fits == len(run.site.branches) * (later.windows + refits)
    new_windows = later.windows if period == "later" else 0  # the rest were stored before
    assert len(run.fits()) == n_fits + len(run.site.branches) * new_windows
    # the analysis of a period that holds the window marks nothing twice
    again = analyze(run.site, run.store, run.source, START, END)
    assert (again.refitted, again.corrections) == (0, 0)


def test_refuse_keeps_the_fits_and_journals_the_corrections_once(
    demo: Path, tmp_path: Path, runs: list[Run]
) -> None:
    run = Run(_copy(demo, tmp_path / "refused", "refuse"))
    runs.append(run)
    ingest(run.site, run.store, run.source)
    analyze(run.site, run.store, run.source, START, END)
    before = run.fits()
    again = _reissue(run.site)
    summary = ingest(run.site, run.store, run.source)
    assert (summary.corrections_applied, summary.corrections_refused) == (0, 3)
    # the same export dropped once more under another name is read, and changes nothing
    third = again.with_name("cw-loopB_20260402_third.csv")
    third.write_text(again.read_text().replace("\n", "\r\n"))  # not the same bytes
    _settled(third)
    summary = ingest(run.site, run.store, run.source)
    assert summary.corrections_refused == 0
    assert len(run.store.read_corrections(action="refused")) == 3
    caught = catch_up(run.site, run.store, run.source, now=END)
    assert caught.refitted == 0
    pd.testing.assert_frame_equal(run.fits(), before)


def test_corrections_are_logged_once_per_batch(
    demo: Path, tmp_path: Path, runs: list[Run], caplog: pytest.LogCaptureFixture
) -> None:
    run = Run(_copy(demo, tmp_path / "logged", "refuse"))
    runs.append(run)
    ingest(run.site, run.store, run.source)
    _reissue(run.site)
    with caplog.at_level("WARNING", logger="monitor.app.ingest"):
        ingest(run.site, run.store, run.source)
    lines = [r.getMessage() for r in caplog.records if "another value" in r.getMessage()]
    assert len(lines) == 1, lines
    assert "3 stored readings" in lines[0]
    assert f"e.g. {TAG} at 2026-04-02 07:30:00Z" in lines[0]  # 09:30 site time
