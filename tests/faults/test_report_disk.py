"""The report folder's disk full, or read-only (issue 9 part 2): `report` ends with one
clear line naming the file, the folder and what to do, the previous report is intact and
no temporary file is left behind.

Root ignores file modes, so the folder is a real small tmpfs (filled up, then remounted
read-only) where `mount` works here; elsewhere the write is patched to raise the same
`OSError` (ENOSPC, EROFS), and the test id says which ran.
"""

from __future__ import annotations

import errno
import shutil
import subprocess
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from adapters.base import open_store
from monitor.app.cli import main
from monitor.app.ingest import ingest, open_source
from tests.faults.harness import make_site


def _mount(*args: str) -> bool:
    if shutil.which("mount") is None:
        return False
    return subprocess.run(["mount", *args], capture_output=True).returncode == 0


@pytest.fixture
def site_on_small_disk(tmp_path: Path) -> Iterator[tuple[Path, Path, bool]]:
    """(site file, report folder, mounted): the site's report folder on a 512 kB tmpfs."""
    path, site = make_site(tmp_path / "site", days=1, step_s=600.0)
    store, source = open_store(site.store_url), open_source(site)
    try:
        ingest(site, store, source)
    finally:
        source.close()
        store.close()
    folder = site.report_folder
    folder.mkdir(parents=True, exist_ok=True)
    mounted = _mount("-t", "tmpfs", "-o", "size=512k", "tmpfs", str(folder))
    try:
        yield path, folder, mounted
    finally:
        if mounted:
            subprocess.run(["umount", str(folder)], capture_output=True)


def _fill(folder: Path) -> None:
    """Fill the disk under *folder* to the last byte."""
    try:
        with (folder / "filler").open("wb", buffering=0) as fh:
            while True:
                fh.write(b"\0" * 4096)
    except OSError as exc:
        assert exc.errno == errno.ENOSPC


@pytest.mark.parametrize("fault", ["disk full", "read-only"])
def test_report_folder_refuses_the_report(
    fault: str, site_on_small_disk: tuple[Path, Path, bool], capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    path, folder, mounted = site_on_small_disk
    day = f"{datetime.now(UTC) - timedelta(days=1):%Y-%m-%d}"
    assert main(["report", str(path), "--date", day]) == 0
    report = folder / f"morning-{day}.html"
    before = report.read_bytes()
    capsys.readouterr()

    code = errno.ENOSPC if fault == "disk full" else errno.EROFS
    if mounted:  # the real thing
        if fault == "disk full":
            _fill(folder)
        else:
            assert _mount("-o", "remount,ro", str(folder)), "remount read-only failed"
    else:  # simulated: the same error from the write
        real = Path.write_text

        def refuse(self: Path, *a: object, **kw: object) -> int:
            if self.parent == folder:
                raise OSError(code, "simulated")
            return real(self, *a, **kw)  # type: ignore[arg-type]

        monkeypatch.setattr(Path, "write_text", refuse)
    print(f"report folder: {'tmpfs' if mounted else 'patched write'}, {fault}")

    assert main(["report", str(path), "--date", day]) == 2  # a user's error (monitor.app.cli)
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1, err  # one line (common practice, STYLE.md)
    assert "Traceback" not in err
    assert str(folder) in err and report.name in err  # where
    # what is wrong: the system's own words for the errno
    assert ("No space left" in err) if fault == "disk full" else ("Read-only" in err), err
    assert "free space" in err and "writable" in err  # what to do
    assert report.read_bytes() == before  # the previous report intact
    assert not list(folder.glob("*.tmp"))  # no cut temp file holding the space
