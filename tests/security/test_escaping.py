"""Every string from the site file, the store or the plant reaches the report as text.

Markup is put into the site name, branch names, descriptions, tags, finding messages and
maintenance notes; the rendered morning report is parsed (html.parser) and must hold no
element or attribute that came from the input, while the input shows as text. The
probes are the classic script and event-handler injections (common practice: OWASP XSS
prevention cheat sheet, rule 1 — escape before inserting into HTML element content).
"""

from __future__ import annotations

import json
import tomllib
from datetime import UTC, datetime, timedelta
from html.parser import HTMLParser
from pathlib import Path

import tomli_w

from adapters.fit_record import WindowFit
from adapters.store import SqlStore
from monitor.app.morning_report import write_report
from monitor.app.notifications import queue_test
from monitor.site.config import load_site

EXAMPLE = Path(__file__).parents[2] / "config" / "example-site.toml"
SCRIPT = "<script>alert(1)</script>"
IMG = '"><img src=x onerror=alert(2)>'
T0 = datetime(2026, 2, 1, tzinfo=UTC)
NOW = T0 + timedelta(days=5)


class _Elements(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.attrs: list[tuple[str, str | None]] = []
        self.text: list[str] = []
        self.images: list[dict[str, str | None]] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        self.attrs += attrs
        if tag == "img":
            self.images.append(dict(attrs))

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def test_markup_in_names_tags_and_notes_is_text_in_the_report(tmp_path: Path) -> None:
    doc = tomllib.loads(EXAMPLE.read_text(encoding="utf-8"))
    doc["site"]["name"] = f"Loop B {SCRIPT}"
    doc["branch"][0]["name"] = f"B1{IMG}"
    doc["branch"][0]["description"] = f"jacket {SCRIPT}"
    doc["branch"][1]["flow"]["tag"] = f"FT-{SCRIPT}"
    (tmp_path / "site.toml").write_text(tomli_w.dumps(doc), encoding="utf-8")
    (tmp_path / "inbox").mkdir()
    site = load_site(tmp_path / "site.toml")
    b1, b2 = site.branches[0].name, site.branches[1].name
    store = SqlStore(site.store_url)
    try:
        store.upsert_fits([WindowFit(
            branch=b, window_start=T0 + timedelta(days=d),
            window_end=T0 + timedelta(days=d + 1), samples=700, status="ok",
            r=1.1 + 0.01 * d, r_low=1.0, r_high=1.2, mean_flow_m3s=0.03)
            for b in (b1, b2) for d in range(4)])
        store.upsert_findings([{
            "branch": b1, "kind": "restriction", "start": T0 + timedelta(days=2),
            "detected": T0 + timedelta(days=3), "end": None, "confidence": 0.9,
            "evidence": {"r_after": 1.4}, "message": f"{b1}: step {SCRIPT}"}])
        store.add_maintenance(b1, "cleaned", T0 + timedelta(days=1), f"jetted {IMG}", now=NOW)
        path = write_report(site, store, day=T0 + timedelta(days=3, hours=12), now=NOW)
    finally:
        store.close()
    page = _Elements()
    page.feed(path.read_text(encoding="utf-8"))
    assert "script" not in page.tags
    # the one image is the report's own trend plot, embedded; none came from the input
    assert all((img.get("src") or "").startswith("data:image/png;base64,")
               and set(img) == {"alt", "src"} for img in page.images)
    assert not any(name.startswith("on") for name, _ in page.attrs)
    assert not any(value and "alert(" in value for _, value in page.attrs)
    text = "".join(page.text)
    assert SCRIPT in text and IMG in text  # shown, as text
    assert f"B1{IMG}" in text


def test_markup_in_the_site_name_is_data_in_a_queued_message(tmp_path: Path) -> None:
    """The outbox body is JSON (json.dumps in monitor/app/notifications.py): the markup comes
    back as the same string, never as structure; an HTML part, if any, holds no element
    from the input."""
    doc = tomllib.loads(EXAMPLE.read_text(encoding="utf-8"))
    doc["site"]["name"] = f'Loop B {SCRIPT} {IMG} ","x":"y'
    doc["notify"] = {"webhook": {"url": "http://127.0.0.1:9/hook"}}
    (tmp_path / "site.toml").write_text(tomli_w.dumps(doc), encoding="utf-8")
    (tmp_path / "inbox").mkdir()
    site = load_site(tmp_path / "site.toml")
    store = SqlStore(site.store_url)
    try:
        assert queue_test(site, store, now=NOW) == 1
        body = json.loads(store.outbox()["body"].iloc[0])
    finally:
        store.close()
    assert doc["site"]["name"] in body["text"]
    assert "x" not in body or body.get("x") != "y"
    if body.get("html"):
        page = _Elements()
        page.feed(body["html"])
        assert "script" not in page.tags and "img" not in page.tags
