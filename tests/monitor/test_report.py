"""The morning report built from a small store: order of the findings, the numbers shown,
the forecast date, the branch table and the maintenance log.

The store holds invented fits and findings for the six branches of
config/example-site.toml; the page is read back with the standard library's HTML parser
and every figure is compared with the row it came from. The urgency order (a branch
short of water, then resistance at or past the cleaning limit, then the lesser sudden
changes, then the rest; costliest first within each) is the product's rule
(monitor/app/report.py), the cleaning limit as a trigger is common practice.
"""

from __future__ import annotations

import re
from datetime import UTC, datetime, timedelta
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from adapters.fit_record import WindowFit
from adapters.store import SqlStore
from monitor.app.morning_report import write_report
from monitor.app.report import ReportInputs, attention_order, build_report
from monitor.site.config import Site, load_site

EXAMPLE_SITE = Path(__file__).resolve().parents[2] / "config" / "example-site.toml"
T0 = datetime(2026, 2, 1, tzinfo=UTC)
DAYS = 10
NOW = T0 + timedelta(days=DAYS, hours=6)


class _Page(HTMLParser):
    """Tables (as lists of rows of cell texts) and the text of each finding box."""

    def __init__(self) -> None:
        super().__init__()
        self.tables: list[list[list[str]]] = []
        self.findings: list[str] = []
        self._cell: list[str] | None = None
        self._box: list[str] | None = None
        self._depth = 0

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        cls = dict(attrs).get("class") or ""
        if tag == "table":
            self.tables.append([])
        elif tag == "tr" and self.tables:
            self.tables[-1].append([])
        elif tag in ("td", "th"):
            self._cell = []
        elif tag == "div" and "finding" in cls.split():
            self._box, self._depth = [], 0
        if tag == "div" and self._box is not None:
            self._depth += 1
        if tag == "br" and self._cell is not None:
            self._cell.append(" | ")

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self._cell is not None:
            self.tables[-1][-1].append("".join(self._cell).strip())
            self._cell = None
        if tag == "div" and self._box is not None:
            self._depth -= 1
            if self._depth == 0:
                self.findings.append("".join(self._box))
                self._box = None

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell.append(data)
        if self._box is not None:
            self._box.append(data)


@pytest.fixture
def site(tmp_path: Path) -> Site:
    path = tmp_path / "site.toml"
    path.write_text(EXAMPLE_SITE.read_text())
    (tmp_path / "inbox").mkdir()
    return load_site(path)


def _fits(site: Site) -> list[dict[str, Any]]:
    """Daily fits: branch k has r = 1.05 + 0.1·k + slope_k·d, slope_k = 0.002·(k + 1)."""
    rows = []
    for k, b in enumerate(site.branches):
        for d in range(DAYS):
            r = 1.05 + 0.1 * k + 0.002 * (k + 1) * d
            rows.append({
                "branch": b.name, "window_start": T0 + timedelta(days=d),
                "window_end": T0 + timedelta(days=d + 1), "samples": 700, "status": "ok",
                "r": r, "r_low": r - 0.01 * (k + 1), "r_high": r + 0.02,
                "mean_flow_m3s": (b.min_flow_m3s * (1.2 if k != 3 else 0.8)),
            })  # fmt: skip
    return rows


def _finding(branch: str, kind: str, start_day: float, *, end: bool = False,
             confidence: float = 0.8, **evidence: float) -> dict[str, Any]:  # fmt: skip
    start = T0 + timedelta(days=start_day)
    return {"branch": branch, "kind": kind, "start": start,
            "detected": start + timedelta(days=1),
            "end": start + timedelta(days=2) if end else None, "confidence": confidence,
            "evidence": evidence, "message": f"{branch}: {kind} message."}  # fmt: skip


LIMIT_DAY = pd.Timestamp("2026-04-20 10:00", tz="UTC")
FINDINGS = [
    # fouling below its limit, the least cost of those with a cost: after the steps
    _finding("B3-quench", "fouling", 1, r_recent=1.30, cleaning_limit_r=1.5, days_to_limit=70,
             extra_energy_kwh_per_day=10.0, lost_flow_m3h=1.0, slope_per_day=0.004,
             limit_date_s=LIMIT_DAY.timestamp(),
             limit_date_low_s=(LIMIT_DAY - pd.Timedelta(days=20)).timestamp(),
             limit_date_high_s=(LIMIT_DAY + pd.Timedelta(days=45)).timestamp()),
    # a restriction below the limit, costlier than both fouling findings: still after the
    # fouling past its limit
    _finding("B2-compressor", "restriction", 5, r_after=1.30, extra_energy_kwh_per_day=90.0,
             lost_flow_m3h=6.0, confidence=0.95),
    # fouling past its cleaning limit
    _finding("B1-reactor", "fouling", 0, r_recent=1.62, cleaning_limit_r=1.5,
             days_to_limit=0.0, extra_energy_kwh_per_day=40.0, lost_flow_m3h=4.0),
    _finding("B5-spray", "instrument", 3, confidence=0.9, frozen=96.0),
    # low flow: the branch is short of water now, first whatever it costs
    _finding("B4-process", "low_flow", 6, mean_flow_m3s=0.005, min_flow_m3s=0.0069),
    # a restriction past the limit, costlier than the fouling past it: first of those
    _finding("B6-chiller", "restriction", 4, r_after=1.70, extra_energy_kwh_per_day=120.0,
             lost_flow_m3h=9.0),
    # ended: not on the list
    _finding("B6-chiller", "back_pressure", 2, end=True, step_pa=2e4),
]  # fmt: skip
EXPECTED = [("B4-process", "low_flow"), ("B6-chiller", "restriction"),
            ("B1-reactor", "fouling"), ("B2-compressor", "restriction"),
            ("B3-quench", "fouling"), ("B5-spray", "instrument")]  # fmt: skip


def _page(site: Site) -> tuple[str, _Page, SqlStore]:
    store = SqlStore(site.store_url)
    store.upsert_fits(WindowFit(**row) for row in _fits(site))
    store.upsert_findings(FINDINGS)
    a = store.add_maintenance("B1-reactor", "cleaned", T0 + timedelta(days=3, hours=9),
                              "hydro-jetted E-110", now=NOW)  # fmt: skip
    b = store.add_maintenance("B2-compressor", "valve_set", T0 + timedelta(days=6), "", now=NOW)
    store.withdraw_maintenance(b, by="shift-B", note="logged on the wrong branch", now=NOW)
    store.add_maintenance("B3-quench", "inspected", T0 - timedelta(days=120), "old", now=NOW)
    path = write_report(site, store, day=T0 + timedelta(days=DAYS - 1, hours=12), now=NOW)
    text = path.read_text(encoding="utf-8")
    page = _Page()
    page.feed(text)
    assert a == 1
    return text, page, store


def test_findings_are_listed_by_urgency_then_cost(site: Site) -> None:
    _, page, store = _page(site)
    store.close()
    shown = [(b, k) for box in page.findings for b, k in EXPECTED if box.count(b) and
             f"{b}: {k} message." in box]  # fmt: skip
    assert shown == EXPECTED
    assert len(page.findings) == len(EXPECTED)  # the ended finding is not listed
    # the same order from the function the page uses, on the open findings alone
    frame = pd.DataFrame([f for f in FINDINGS if f["end"] is None])
    assert list(zip(attention_order(site, frame)["branch"], attention_order(site, frame)["kind"],
                    strict=True)) == EXPECTED  # fmt: skip


def test_values_in_the_findings_are_those_of_the_evidence(site: Site) -> None:
    _, page, store = _page(site)
    store.close()
    boxes = {b: box for box in page.findings for b, _ in EXPECTED if f"{b}:" in box}
    assert "flow lost 9.0 m3/h · extra pumping 120 kWh/day" in boxes["B6-chiller"]
    assert "flow lost 4.0 m3/h · extra pumping 40 kWh/day" in boxes["B1-reactor"]
    assert "confidence 95%" in boxes["B2-compressor"]
    # the forecast date, site time (Europe/Berlin), with its interval
    assert ("Forecast: r reaches the cleaning limit 1.50 about 2026-04-20 (between "
            "2026-03-31 and 2026-06-04).") in boxes["B3-quench"]
    assert "Forecast: at or past the cleaning limit 1.50 (r 1.62)." in boxes["B1-reactor"]
    assert "r rising 0.120 per month" in boxes["B3-quench"]  # 0.004 per day × 30


def test_branch_table_shows_each_branchs_last_fit(site: Site) -> None:
    _, page, store = _page(site)
    store.close()
    table = next(t for t in page.tables if t and t[0][:2] == ["branch", "resistance ratio r"])
    by_name = {row[0].split(" | ")[0]: row for row in table[1:]}
    assert list(by_name) == [b.name for b in site.branches]
    for k, b in enumerate(site.branches):
        row = by_name[b.name]
        slope = 0.002 * (k + 1)
        r_last = 1.05 + 0.1 * k + slope * (DAYS - 1)
        assert row[0] == f"{b.name} | {b.description}"
        assert row[1] == f"{r_last:.3f}"
        assert row[2] == f"{r_last - 0.01 * (k + 1):.3f}–{r_last + 0.02:.3f}"
        # the fit whose window ended 7 days before the last one: 7 windows earlier
        assert row[3] == f"{7 * slope:+.3f}"
        assert row[4] == f"{b.cleaning_limit:.2f}"
        factor = 1.2 if k != 3 else 0.8
        assert row[5] == f"{b.min_flow_m3s * factor * 3600:.1f} / {b.min_flow_m3s * 3600:.0f}"
        assert row[6] == "2026-02-11 01:00"  # the last window's end, site time


def test_maintenance_log_section_in_site_time(site: Site) -> None:
    text, page, store = _page(site)
    store.close()
    table = next(t for t in page.tables if t and t[0][0] == "entry")
    assert table[0][1] == "time (Europe/Berlin)"
    rows = table[1:]
    # newest first; the entry older than the section's reach is left out
    assert [r[2] for r in rows] == ["B2-compressor", "B1-reactor"]
    assert rows[1][:5] == ["1", "2026-02-04 10:00", "B1-reactor", "cleaned",
                           "hydro-jetted E-110"]  # fmt: skip
    assert re.fullmatch(r"withdrawn 2026-02-11 07:00 by shift-B: logged on the wrong branch",
                        rows[0][5])  # fmt: skip
    assert "old" not in [r[4] for r in rows]
    assert text.index("<h2>Branches</h2>") < text.index("<h2>Maintenance log")


def test_report_without_maintenance_says_so(site: Site) -> None:
    html = build_report(ReportInputs(
        site=site, day=T0, fits=pd.DataFrame(), findings=pd.DataFrame(),
        alarms=pd.DataFrame(), quarantine={}, health=pd.DataFrame(), generated=NOW,
    ))  # fmt: skip
    assert "No maintenance logged." in html and "Nothing: no open findings." in html
