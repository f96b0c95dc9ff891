"""`monitor.app.jobs.analyze` with worker processes: the same stored results as in-process,
and an interrupted backfill keeps every window before the interruption, with no holes.

Invented data: the example site simulated for a few days at 10-minute steps, ingested
from the demo's CSV exports into a SQLite store per run.
"""

from __future__ import annotations

import pickle
import shutil
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any, ClassVar

import pandas as pd
import pytest

from adapters.base import open_store
from adapters.store import SqlStore
from monitor.app import backfill
from monitor.app.cli import main
from monitor.app.demo import DEMO_START, prepare_demo
from monitor.app.ingest import ingest, open_source
from monitor.app.jobs import analyze
from monitor.app.windows import windows
from monitor.site.config import Site, load_site

DAYS = 6
END = DEMO_START + timedelta(days=DAYS)


class FailingStore(SqlStore):
    """A SQLite store whose reading of the window at *fail_at* fails, also when reopened
    in a worker process."""

    alias: ClassVar[str] = ""  # not a store a site file can name

    def __init__(self, url: str, fail_at: datetime) -> None:
        super().__init__(url)
        self.fail_at = fail_at

    def read_readings(self, tags: Any, start: datetime, end: datetime) -> pd.DataFrame:
        if start == self.fail_at:
            raise RuntimeError("historian connection lost")
        return super().read_readings(tags, start, end)

    def __reduce__(self) -> tuple[Any, ...]:
        return (FailingStore, (self.url.render_as_string(hide_password=False), self.fail_at))


def _spans(site: Site) -> list[tuple[datetime, datetime]]:
    return list(windows(DEMO_START, END, site.window, site.timezone))


@pytest.fixture(scope="module")
def demo_folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Exports of the demo site, ingested once into a template store file."""
    folder = tmp_path_factory.mktemp("parallel")
    paths = prepare_demo(folder / "site", days=DAYS, step_s=600.0)
    site = load_site(paths.site_file)
    store = open_store(site.store_url)
    try:
        ingest(site, store, open_source(site))
    finally:
        store.close()
    return paths.folder


def _copy_store(site: Site, folder: Path) -> str:
    """A private copy of the ingested store (readings only are in it)."""
    src = Path(site.store_url.removeprefix("sqlite:///"))
    dst = folder / "store.db"
    shutil.copyfile(src, dst)
    return f"sqlite:///{dst}"


def _fits(store: SqlStore) -> pd.DataFrame:
    return (store.read_fits().drop(columns="computed_at")
            .sort_values(["branch", "window_start"]).reset_index(drop=True))


def _spy_workers(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """Counts of windows handed to worker processes, one entry per pool."""
    handed: list[int] = []
    real = backfill._in_workers

    def spy(*args: Any) -> Any:
        handed.append(len(args[3]))
        return real(*args)

    monkeypatch.setattr(backfill, "_in_workers", spy)
    return handed


def test_workers_store_the_same_fits_as_in_process(
    demo_folder: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    site = load_site(demo_folder / "site.toml")
    source = open_source(site)
    handed = _spy_workers(monkeypatch)
    results = {}
    for jobs in (1, 2):
        (tmp_path / str(jobs)).mkdir()
        store = SqlStore(_copy_store(site, tmp_path / str(jobs)))
        done: list[tuple[int, int]] = []
        summary = analyze(site, store, source, DEMO_START, END, jobs=jobs,
                          progress=lambda i, n, done=done: done.append((i, n)),
                          parallel_after_s=0.0)
        n = len(_spans(site))
        assert n >= 4 and done == [(i, n) for i in range(1, n + 1)]
        results[jobs] = (summary, _fits(store), store.read_screening(), store.read_balance())
        store.close()
    # the first window in this process (timed), the others in the workers
    assert handed == [len(_spans(site)) - 1]
    (one, fits1, screen1, bal1), (two, fits2, screen2, bal2) = results[1], results[2]
    assert (one.windows, one.fits, one.fits_ok, one.readings) == (
        two.windows, two.fits, two.fits_ok, two.readings)
    assert one.fits == one.windows * len(site.branches) and one.fits_ok > 0
    pd.testing.assert_frame_equal(fits1, fits2)
    pd.testing.assert_frame_equal(screen1, screen2)
    pd.testing.assert_frame_equal(bal1, bal2)
    assert [f.to_json_dict() for f in one.findings] == [f.to_json_dict() for f in two.findings]


@pytest.mark.parametrize("jobs", [1, 2])
def test_a_failing_window_keeps_every_window_before_it(
    demo_folder: Path, tmp_path: Path, jobs: int
) -> None:
    site = load_site(demo_folder / "site.toml")
    spans = _spans(site)
    store = FailingStore(_copy_store(site, tmp_path), fail_at=spans[2][0])
    with pytest.raises(RuntimeError, match="historian connection lost"):
        analyze(site, store, open_source(site), DEMO_START, END, jobs=jobs,
                parallel_after_s=0.0)
    starts = sorted(set(store.read_fits()["window_start"]))
    # windows after the failing one may have finished in a worker: none is written
    assert starts == [pd.Timestamp(a) for a, _ in spans[:2]]
    store.close()


def test_an_interrupted_run_keeps_the_windows_written_so_far(
    demo_folder: Path, tmp_path: Path
) -> None:
    site = load_site(demo_folder / "site.toml")
    store = SqlStore(_copy_store(site, tmp_path))

    def stop_after_two(done: int, total: int) -> None:
        if done == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        analyze(site, store, open_source(site), DEMO_START, END, jobs=2,
                progress=stop_after_two, parallel_after_s=0.0)
    starts = sorted(set(store.read_fits()["window_start"]))
    assert starts == [pd.Timestamp(a) for a, _ in _spans(site)[:2]]
    store.close()


def test_a_store_that_cannot_be_reopened_is_served_in_process(demo_folder: Path) -> None:
    site = load_site(demo_folder / "site.toml")
    memory = SqlStore("sqlite://")
    with pytest.raises(TypeError, match="in-memory"):
        pickle.dumps(memory)
    summary = analyze(site, memory, open_source(site), DEMO_START, END, jobs=2,
                      parallel_after_s=0.0)
    assert summary.windows == len(_spans(site)) >= 2
    assert summary.fits == summary.windows * len(site.branches)
    memory.close()


def test_a_short_run_stays_in_process(
    demo_folder: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # a few small windows take far less than the workers' start: no pool at all
    site = load_site(demo_folder / "site.toml")
    handed = _spy_workers(monkeypatch)
    store = SqlStore(_copy_store(site, tmp_path))
    summary = analyze(site, store, open_source(site), DEMO_START, END, jobs=2)
    assert handed == [] and summary.windows == len(_spans(site))
    store.close()


def test_jobs_must_be_positive(demo_folder: Path) -> None:
    site = load_site(demo_folder / "site.toml")
    with pytest.raises(ValueError, match="jobs must be >= 1"):
        analyze(site, SqlStore("sqlite://"), open_source(site), DEMO_START,
                DEMO_START + timedelta(days=1), jobs=0)


def test_cli_analyze_jobs(demo_folder: Path, tmp_path: Path,
                          capsys: pytest.CaptureFixture[str]) -> None:
    folder = tmp_path / "site"
    shutil.copytree(demo_folder, folder)
    site_file = str(folder / "site.toml")
    span = ["--from", DEMO_START.isoformat(), "--to", END.isoformat()]
    with pytest.raises(SystemExit) as exit_info:
        main(["analyze", site_file, *span, "--jobs", "0"])
    assert exit_info.value.code == 2
    assert "--jobs: must be 1 or more" in capsys.readouterr().err
    assert main(["analyze", site_file, *span, "--jobs", "2", "--quiet"]) == 0
    site = load_site(folder / "site.toml")
    n = len(_spans(site))
    assert f"{n} windows, {n * len(site.branches)} branch fits" in capsys.readouterr().out
