"""The morning and the monthly report in a real browser: headless Chromium.

Each page is loaded from its file in a fresh Chromium profile, driven over the Chrome
DevTools Protocol on a pipe (``--remote-debugging-pipe``: JSON messages separated by NUL
bytes on file descriptors 3 and 4; the protocol is documented by the Chromium project at
chromedevtools.github.io/devtools-protocol), so no extra Python package is needed. A page
passes when the browser reports no console error, no uncaught exception and no error log
entry (a resource that failed to load is one), when every image has decoded to a size
above zero and its pixels are not all one colour, and when a full-page screenshot can be
taken; the screenshots are written beside the reports (``*.png``) for a person to look at.

Without Chromium the tests skip with the reason; with ``BRANCHWATCH_REQUIRE_SERVERS=1``
(CI, `.ci/run` installs it) they fail instead, as the database tests do.
"""

from __future__ import annotations

import base64
import contextlib
import io
import json
import os
import select
import shutil
import subprocess
import tempfile
import time
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest

from monitor.app.monthly import write_monthly
from monitor.app.morning_report import write_report
from monitor.site.config import Site
from tests.conftest import REQUIRE_SERVERS
from tests.monitor.test_monthly import GENERATED, MONTH, filled_store, make_site

CHROMIUM_CANDIDATES = ("/usr/bin/chromium", "/usr/bin/chromium-browser",
                       "/usr/bin/google-chrome")
#: The flags this machine needs (no sandbox as root, no GPU, no network chatter).
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars", "--remote-debugging-pipe")
TIMEOUT_S = 60.0

#: Runs in the page: decode every image and look at its pixels (a sample of them).
IMAGE_CHECK = """(async () => {
  const out = [];
  for (const img of Array.from(document.images)) {
    const item = {alt: img.alt, width: 0, height: 0, colours: 0, error: null};
    try { await img.decode(); } catch (e) { item.error = String(e); out.push(item); continue; }
    item.width = img.naturalWidth; item.height = img.naturalHeight;
    const c = document.createElement('canvas');
    c.width = item.width; c.height = item.height;
    const g = c.getContext('2d');
    g.drawImage(img, 0, 0);
    const d = g.getImageData(0, 0, c.width, c.height).data;
    const seen = new Set();
    for (let i = 0; i < d.length && seen.size < 16; i += 4 * 37) {
      seen.add(d[i] * 65536 + d[i + 1] * 256 + d[i + 2]);
    }
    item.colours = seen.size;
    out.push(item);
  }
  return {title: document.title, images: out,
          links: Array.from(document.links).map(a => a.href)};
})()"""


def chromium() -> str:
    """The Chromium executable; skips (or fails in CI) when there is none."""
    for path in (os.environ.get("BRANCHWATCH_CHROMIUM", ""), *CHROMIUM_CANDIDATES):
        if path and os.access(path, os.X_OK):
            return path
    found = shutil.which("chromium")
    if found:
        return found
    message = ("no Chromium found (looked for " + ", ".join(CHROMIUM_CANDIDATES) + "); "
               "install it with: apt-get install -y chromium chromium-driver")
    if REQUIRE_SERVERS:
        pytest.fail(message + " (BRANCHWATCH_REQUIRE_SERVERS=1: CI requires it)")
    pytest.skip(message)


class Browser:
    """One headless Chromium driven over the DevTools pipe."""

    def __init__(self, executable: str, profile: Path) -> None:
        to_chrome_r, self._to_chrome = os.pipe()
        self._from_chrome, from_chrome_w = os.pipe()
        # Chromium reads commands on fd 3 and writes replies on fd 4: bash (whose
        # redirections take any descriptor number, unlike a POSIX sh) puts the
        # two pipe ends there and closes their original numbers before it execs
        script = (f'exec "$0" "$@" 3<&{to_chrome_r} 4>&{from_chrome_w} '
                  f'{to_chrome_r}<&- {from_chrome_w}>&-')
        self.log = profile / "chromium-stderr.log"
        with self.log.open("wb") as err:  # its chatter, never read while it runs
            self.proc = subprocess.Popen(
                ["/bin/bash", "-c", script, executable, *FLAGS,
                 f"--user-data-dir={profile}", "about:blank"],
                pass_fds=(to_chrome_r, from_chrome_w), stdin=subprocess.DEVNULL,
                stdout=subprocess.DEVNULL, stderr=err,
            )
        os.close(to_chrome_r)
        os.close(from_chrome_w)
        self._buf = b""
        self._id = 0
        self.events: list[dict[str, Any]] = []

    def close(self) -> None:
        with contextlib.suppress(OSError, TimeoutError, RuntimeError):
            self.send("Browser.close")
        try:
            self.proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=15)
        for fd in (self._to_chrome, self._from_chrome):
            with contextlib.suppress(OSError):
                os.close(fd)

    def _read(self, deadline: float) -> dict[str, Any]:
        while b"\0" not in self._buf:
            left = deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("Chromium did not answer in time")
            ready, _, _ = select.select([self._from_chrome], [], [], left)
            if ready:
                chunk = os.read(self._from_chrome, 1 << 20)
                if not chunk:
                    tail = self.log.read_text(errors="replace")[-600:]
                    raise RuntimeError(f"Chromium closed its pipe (exit {self.proc.poll()}): "
                                       f"{tail}")
                self._buf += chunk
        raw, self._buf = self._buf.split(b"\0", 1)
        message: dict[str, Any] = json.loads(raw)
        return message

    def send(self, method: str, params: dict[str, Any] | None = None,
             session: str | None = None) -> dict[str, Any]:
        """Send one command; events that arrive meanwhile are kept in `events`."""
        self._id += 1
        msg: dict[str, Any] = {"id": self._id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        os.write(self._to_chrome, json.dumps(msg).encode() + b"\0")
        deadline = time.monotonic() + TIMEOUT_S
        while True:
            reply = self._read(deadline)
            if reply.get("id") == self._id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                result: dict[str, Any] = reply.get("result", {})
                return result
            self.events.append(reply)

    def wait_for(self, method: str, session: str) -> None:
        deadline = time.monotonic() + TIMEOUT_S
        while not any(e.get("method") == method and e.get("sessionId") == session
                      for e in self.events):
            self.events.append(self._read(deadline))

    def load(self, url: str, screenshot: Path) -> dict[str, Any]:
        """Open *url* in a new tab, check its images, write a full-page screenshot;
        returns the page's facts and the errors the browser reported."""
        target = self.send("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = self.send("Target.attachToTarget",
                            {"targetId": target, "flatten": True})["sessionId"]
        for method in ("Page.enable", "Runtime.enable", "Log.enable"):
            self.send(method, session=session)
        self.send("Emulation.setDeviceMetricsOverride",
                  {"width": 1100, "height": 900, "deviceScaleFactor": 1, "mobile": False},
                  session=session)
        start = len(self.events)
        self.send("Page.navigate", {"url": url}, session=session)
        self.wait_for("Page.loadEventFired", session)
        facts = self.send("Runtime.evaluate", {"expression": IMAGE_CHECK, "awaitPromise": True,
                                               "returnByValue": True}, session=session)
        page = facts["result"]["value"]
        size = self.send("Page.getLayoutMetrics", session=session)["cssContentSize"]
        shot = self.send("Page.captureScreenshot", {
            "format": "png", "captureBeyondViewport": True,
            "clip": {"x": 0, "y": 0, "width": size["width"], "height": size["height"],
                     "scale": 1}}, session=session)
        screenshot.write_bytes(base64.b64decode(shot["data"]))
        page["errors"] = [_error_text(e) for e in self.events[start:]
                          if e.get("sessionId") == session and _is_error(e)]
        page["height"] = size["height"]
        self.send("Target.closeTarget", {"targetId": target})
        return page


def _is_error(event: dict[str, Any]) -> bool:
    method, params = event.get("method"), event.get("params") or {}
    if method == "Runtime.consoleAPICalled":
        return params.get("type") in ("error", "assert")
    if method == "Runtime.exceptionThrown":
        return True
    if method == "Log.entryAdded":
        return (params.get("entry") or {}).get("level") == "error"
    return False


def _error_text(event: dict[str, Any]) -> str:
    return json.dumps(event.get("params"))[:400]


@pytest.fixture(scope="module")
def browser() -> Iterator[Browser]:
    exe = chromium()
    with tempfile.TemporaryDirectory(prefix="bw-chromium-") as profile:
        b = Browser(exe, Path(profile))
        try:
            b.send("Browser.getVersion")
            yield b
        finally:
            b.close()


@pytest.fixture(scope="module")
def reports(tmp_path_factory: pytest.TempPathFactory) -> tuple[Site, Path, Path]:
    site = make_site(tmp_path_factory.mktemp("browser") / "site")
    store = filled_store(site)
    try:
        monthly = write_monthly(site, store, month=MONTH, generated=GENERATED)
        morning = write_report(site, store, day=datetime(2026, 8, 31, 12, tzinfo=UTC),
                               now=GENERATED)
    finally:
        store.close()
    return site, morning, monthly


def _check_page(page: dict[str, Any], screenshot: Path, images: int) -> None:
    from PIL import Image

    assert page["errors"] == []
    assert len(page["images"]) == images
    for img in page["images"]:
        assert img["error"] is None, img
        assert img["width"] > 0 and img["height"] > 0, img
        assert img["colours"] > 1, f"image {img['alt']!r} is all one colour"
    with Image.open(io.BytesIO(screenshot.read_bytes())) as shot:
        assert shot.size[0] >= 1000 and shot.size[1] >= 900
        colours = shot.convert("RGB").getcolors(maxcolors=1 << 20)
        assert colours is None or len(colours) > 16  # text, plots and tables, not a blank


def test_morning_report_in_chromium(browser: Browser, reports: tuple[Site, Path, Path]
                                    ) -> None:
    _site, morning, monthly = reports
    shot = morning.with_suffix(".png")
    page = browser.load(morning.as_uri(), shot)
    _check_page(page, shot, images=1)  # the resistance trends
    # the link to the monthly report resolves to the file written beside it
    assert monthly.as_uri() in page["links"]


def test_monthly_report_in_chromium(browser: Browser, reports: tuple[Site, Path, Path]
                                    ) -> None:
    site, _morning, monthly = reports
    shot = monthly.with_suffix(".png")
    page = browser.load(monthly.as_uri(), shot)
    _check_page(page, shot, images=len(site.branches) + 1)  # per branch, and by month
    csv_uri = monthly.with_name(monthly.stem + "-fits.csv").as_uri()
    assert csv_uri in page["links"] and Path(monthly.with_name(monthly.stem + "-fits.csv")
                                             ).exists()
    assert page["title"].endswith("August 2026")


def test_a_broken_image_is_caught(browser: Browser, tmp_path: Path) -> None:
    """The check itself: a page with an undecodable image, a blank one and a console
    error fails each part of `_check_page` (otherwise the tests above could not fail)."""
    from PIL import Image

    blank = io.BytesIO()
    Image.new("RGB", (40, 30), "white").save(blank, format="PNG")
    uri = "data:image/png;base64," + base64.b64encode(blank.getvalue()).decode()
    page_file = tmp_path / "bad.html"
    page_file.write_text("<!doctype html><title>t</title><img alt=broken src='data:image/png;"
                         f"base64,AAAA'><img alt=blank src='{uri}'>"
                         "<script>console.error('boom')</script>")
    page = browser.load(page_file.as_uri(), tmp_path / "bad.png")
    assert any("boom" in e for e in page["errors"])
    broken, white = page["images"]
    assert broken["error"] is not None and broken["width"] == 0
    assert white["error"] is None and (white["width"], white["height"]) == (40, 30)
    assert white["colours"] == 1
