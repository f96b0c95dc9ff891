"""The monthly report built from a store of invented fits, findings and maintenance.

The store holds 400 days of daily fits for the six branches of config/example-site.toml
(site time Europe/Berlin): B1-reactor fouls from day 150 at 0.0015 per day, B2-compressor
carries a restriction from day 300 until a valve setting on day 340, the others stay
clean. Flows are those of the branch model at the day's header pressure and r, so the
costs are those of a plant that follows its model. The page is read back with the
standard library's HTML parser and its figures compared with the rows they came from.
References are named beside each check; rules of the product say so.
"""

from __future__ import annotations

import csv
import io
import re
from datetime import UTC, datetime, timedelta
from html.parser import HTMLParser
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest

from adapters.fit_record import WindowFit
from adapters.store import SqlStore
from monitor.analysis.findings import Finding
from monitor.app import cli
from monitor.app.daemon import Daemon, _monthly, last_fire_time
from monitor.app.monthly import latest_monthly, write_monthly
from monitor.app.monthly_page import MonthlyInputs, build_monthly
from monitor.app.monthly_view import daily_costs, month_bounds, parse_month, previous_month
from monitor.app.morning_report import write_report
from monitor.app.site_diagnosis import _with_cost
from monitor.site.analysis_sections import parse_energy_price
from monitor.site.config import ConfigError, Site, load_site

EXAMPLE_SITE = Path(__file__).resolve().parents[2] / "config" / "example-site.toml"
T0 = datetime(2025, 9, 1, tzinfo=UTC)
DAYS = 400
MONTH = "2026-08"
GENERATED = datetime(2026, 9, 1, 5, 0, tzinfo=UTC)
P_S = 3.4e5  # header pressure [Pa g], invented
FOUL_DAY, SLOPE = 150, 0.0015
RESTRICT_DAY, SET_DAY, R_RESTRICT = 300, 340, 1.30
HOSTILE = "meter <b>FT-510</b> & \"spikes\" <script>alert(1)</script>"


class _Page(HTMLParser):
    """Tables (rows of cell texts), the text of the page, and the images' sources."""

    def __init__(self) -> None:
        super().__init__()
        self.tables: list[list[list[str]]] = []
        self.text: list[str] = []
        self.images: list[str] = []
        self.links: list[str] = []
        self._cell: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        if tag == "table":
            self.tables.append([])
        elif tag == "tr" and self.tables:
            self.tables[-1].append([])
        elif tag in ("td", "th"):
            self._cell = []
        elif tag == "img":
            self.images.append(a.get("src") or "")
        elif tag == "a":
            self.links.append(a.get("href") or "")
        elif tag == "br" and self._cell is not None:
            self._cell.append(" ")

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self._cell is not None:
            self.tables[-1][-1].append(" ".join("".join(self._cell).split()))
            self._cell = None

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self._cell is not None:
            self._cell.append(data)

    def table(self, first_header: str) -> list[list[str]]:
        return next(t for t in self.tables if t and t[0] and t[0][0] == first_header)

    @property
    def all_text(self) -> str:
        return " ".join("".join(self.text).split())


def _r(k: int, d: int) -> float:
    if k == 0 and d >= FOUL_DAY:
        return 1.0 + SLOPE * (d - FOUL_DAY)
    if k == 1 and RESTRICT_DAY <= d < SET_DAY:
        return R_RESTRICT
    return 1.0


def make_site(folder: Path) -> Site:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "site.toml"
    path.write_text(EXAMPLE_SITE.read_text())
    (folder / "inbox").mkdir(exist_ok=True)
    return load_site(path)


def fit_rows(site: Site) -> list[dict[str, Any]]:
    rows = []
    for k, b in enumerate(site.branches):
        r = np.array([_r(k, d) for d in range(DAYS)])
        cond = {"temperature_c": 20.0, **b.nominal}
        q = np.asarray(b.model.flow(np.full(DAYS, P_S), resistance_ratio=r, **cond))
        for d in range(DAYS):
            rows.append({
                "branch": b.name, "window_start": T0 + timedelta(days=d),
                "window_end": T0 + timedelta(days=d + 1), "samples": 140, "status": "ok",
                "r": r[d], "r_low": r[d] - 0.01, "r_high": r[d] + 0.01,
                "mean_flow_m3s": float(q[d]), "header_pressure_pa": P_S, "temperature_c": 20.0,
            })  # fmt: skip
    return rows


def finding_rows() -> list[dict[str, Any]]:
    day = 86400.0
    t_eval = T0 + timedelta(days=365)  # the fouling finding's last evaluation: 2026-09-01
    r_now = 1.0 + SLOPE * (365 - FOUL_DAY)
    eta = (1.5 - r_now) / SLOPE
    ev = {"r_baseline": 1.0, "r_now": r_now, "r_recent": r_now, "cleaning_limit_r": 1.5,
          "slope_per_day": SLOPE, "slope_low_per_day": 0.0010, "slope_high_per_day": 0.0020,
          "days_to_limit": eta, "limit_date_s": t_eval.timestamp() + eta * day,
          "limit_date_low_s": t_eval.timestamp() + (1.5 - r_now) / 0.0020 * day,
          "limit_date_high_s": t_eval.timestamp() + (1.5 - r_now) / 0.0010 * day}
    return [
        {"branch": "B1-reactor", "kind": "fouling", "start": T0 + timedelta(days=FOUL_DAY),
         "detected": T0 + timedelta(days=FOUL_DAY + 20), "end": None, "confidence": 0.9,
         "evidence": ev, "message": "B1-reactor is fouling."},
        {"branch": "B2-compressor", "kind": "restriction",
         "start": T0 + timedelta(days=RESTRICT_DAY),
         "detected": T0 + timedelta(days=RESTRICT_DAY + 1),
         "end": T0 + timedelta(days=SET_DAY), "confidence": 0.95,
         "evidence": {"r_baseline": 1.0, "r_after": R_RESTRICT},
         "message": "B2-compressor: resistance ratio stepped from 1.00 to 1.30."},
        {"branch": "B5-spray", "kind": "instrument", "start": T0 + timedelta(days=335),
         "detected": T0 + timedelta(days=336), "end": None, "confidence": 0.8,
         "evidence": {"spikes": 40.0}, "message": HOSTILE},
    ]  # fmt: skip


def filled_store(site: Site) -> SqlStore:
    store = SqlStore(site.store_url)
    store.upsert_fits(WindowFit(**row) for row in fit_rows(site))
    store.upsert_findings(finding_rows())
    store.add_maintenance("B2-compressor", "valve_set", T0 + timedelta(days=SET_DAY),
                          "reopened HV-210 fully", now=GENERATED)  # fmt: skip
    return store


@pytest.fixture
def site(tmp_path: Path) -> Site:
    return make_site(tmp_path / "site")


def _page(site: Site) -> tuple[Path, _Page, SqlStore]:
    store = filled_store(site)
    path = write_monthly(site, store, month=MONTH, generated=GENERATED)
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    return path, page, store


def _month_days() -> range:
    """Fit indices whose window starts in August 2026 site time (UTC midnights 1–31 Aug)."""
    first = (datetime(2026, 8, 1, tzinfo=UTC) - T0).days
    return range(first, first + 31)


# ---------------------------------------------------------------------------------------
# config and calendar


def test_energy_price_in_the_cost_section(tmp_path: Path) -> None:
    # 1 MWh = 1000 kWh (SI prefixes, BIPM SI Brochure 9th ed. §3)
    assert parse_energy_price("140 USD/MWh").per_kwh == pytest.approx(0.14)
    assert parse_energy_price("0.14 EUR/kWh").currency == "EUR"
    bad = tmp_path / "bad.toml"
    bad.write_text(EXAMPLE_SITE.read_text().replace('"0.14 EUR/kWh"', '"cheap"'))
    with pytest.raises(ConfigError, match=r"bad.toml: cost.energy_price: .*'cheap' is not an "
                       r"energy price like '0.14 EUR/kWh'"):  # fmt: skip
        load_site(bad)
    # without a [cost] section there is no price: the report shows kWh only
    none = tmp_path / "none.toml"
    none.write_text(re.sub(r"\[cost\]\nenergy_price = [^\n]*\n", "", EXAMPLE_SITE.read_text()))
    assert load_site(none).energy_price is None


def test_month_bounds_are_the_site_local_calendar_month(site: Site) -> None:
    # Europe/Berlin: CET (UTC+1) in winter, CEST (UTC+2) from the last Sunday of March,
    # 2026-03-29 (Directive 2000/84/EC)
    assert month_bounds(site, "2026-03") == (datetime(2026, 2, 28, 23, tzinfo=UTC),
                                             datetime(2026, 3, 31, 22, tzinfo=UTC))
    assert previous_month(site, datetime(2026, 8, 31, 22, 30, tzinfo=UTC)) == "2026-08"
    assert previous_month(site, datetime(2026, 1, 1, 6, tzinfo=UTC)) == "2025-12"
    for bad in ("2026-13", "2026-8x", "August"):
        with pytest.raises(ValueError, match="is not a calendar month like 2026-08"):
            parse_month(bad)


# ---------------------------------------------------------------------------------------
# costs


def test_daily_cost_agrees_with_the_findings_cost_and_scales_with_the_rise(site: Site) -> None:
    store = filled_store(site)
    try:
        fits = store.read_fits()
        findings = store.read_findings()
    finally:
        store.close()
    days = daily_costs(site, fits, findings).set_index(["branch", "window_start"])
    # the cost the daily diagnosis stores in a finding's evidence
    # (monitor.app.site_diagnosis._with_cost, from the newest fit) is the monthly report's cost
    # of that same day: one rule
    f = finding_rows()[0]
    costed = _with_cost(site, fits, Finding(
        branch=f["branch"], kind=f["kind"], start=f["start"], detected=f["detected"],
        end=None, confidence=f["confidence"], evidence=f["evidence"], message=f["message"]))
    last = days.loc[("B1-reactor", pd.Timestamp(T0 + timedelta(days=DAYS - 1)))]
    assert last["extra_kwh"] == pytest.approx(
        costed.evidence["extra_energy_kwh_per_day"], rel=1e-9)
    assert last["lost_flow_m3h"] == pytest.approx(costed.evidence["lost_flow_m3h"], rel=1e-9)
    b1 = days.loc["B1-reactor"]
    d1, d2 = FOUL_DAY + 50, FOUL_DAY + 100
    e1 = float(b1.loc[pd.Timestamp(T0 + timedelta(days=d1)), "extra_kwh"])
    e2 = float(b1.loc[pd.Timestamp(T0 + timedelta(days=d2)), "extra_kwh"])
    # hydraulic power P = ΔP·Q/η (common practice): with ΔP_extra = (r − 1)·ΔP_clean(Q),
    # E ∝ (r − 1)·ΔP_clean(Q)·Q; the fouled branch carries less flow, so the ratio
    # of the energies is below the ratio of the rises but above 1
    rise_ratio = (SLOPE * 100) / (SLOPE * 50)
    assert 1.0 < e2 / e1 < rise_ratio
    # nothing is counted before a finding starts, nor after it ends
    assert float(b1.loc[pd.Timestamp(T0 + timedelta(days=FOUL_DAY - 1)), "extra_kwh"]) == 0
    b2 = days.loc["B2-compressor"]
    assert float(b2.loc[pd.Timestamp(T0 + timedelta(days=RESTRICT_DAY + 5)), "extra_kwh"]) > 0
    assert float(b2.loc[pd.Timestamp(T0 + timedelta(days=SET_DAY + 1)), "extra_kwh"]) == 0
    # lost flow is the flow at baseline r less the flow carried (monitor.analysis.diagnose)
    b = site.branch("B1-reactor")
    q_clean = float(b.model.flow(np.asarray(P_S), temperature_c=20.0, **b.nominal))
    row = next(f for f in fit_rows(site) if f["branch"] == "B1-reactor"
               and f["window_start"] == T0 + timedelta(days=d2))
    lost = float(b1.loc[pd.Timestamp(T0 + timedelta(days=d2)), "lost_flow_m3h"])
    assert lost == pytest.approx((q_clean - row["mean_flow_m3s"]) * 3600.0, rel=1e-9)
    assert lost > 0


# ---------------------------------------------------------------------------------------
# the page


def test_branch_table_and_month_totals_come_from_the_fits(site: Site) -> None:
    _, page, store = _page(site)
    store.close()
    fits = pd.DataFrame(fit_rows(site))
    days = daily_costs(site, fits, pd.DataFrame(finding_rows()))
    in_month = days[days["window_start"].isin([T0 + timedelta(days=d) for d in _month_days()])]
    table = page.table("branch")
    by_name = {row[0].split(" ")[0]: row for row in table[1:]}
    b1 = by_name["B1-reactor"]
    r_end = _r(0, _month_days()[-1])
    assert b1[1] == f"{r_end:.3f}"
    assert b1[3] == f"{SLOPE * 30:+.3f}"  # 31 days: the change from the 1st to the 31st
    assert b1[5] == "31 / 31"
    kwh = float(in_month[in_month["branch"] == "B1-reactor"]["extra_kwh"].sum())
    assert b1[7] == f"{kwh:,.0f}"
    assert b1[8] == f"{kwh * 0.14:,.0f} EUR"  # config/example-site.toml: 0.14 EUR/kWh
    total = page.table("branch")[-1]
    all_kwh = float(in_month["extra_kwh"].sum())
    assert total[0] == "all branches" and total[-1] == f"{all_kwh * 0.14:,.0f} EUR"
    # the restriction ended on 2026-08-07 (day 340): B2 costs only the days before
    b2_kwh = float(in_month[in_month["branch"] == "B2-compressor"]["extra_kwh"].sum())
    assert 0 < b2_kwh < kwh
    # by month: the report month first, its energy as in the table
    months = page.table("month")
    assert months[1][0] == MONTH and months[1][1] == f"{all_kwh:,.0f}"
    assert [r[0] for r in months[1:]][:3] == ["2026-08", "2026-07", "2026-06"]
    # 400 days from 2025-09-01: the long view reaches back to the first fit's month
    assert months[-1][0] == "2025-09"


def test_page_is_escaped_in_site_time_with_caution_plots_and_forecast(site: Site) -> None:
    path, page, store = _page(site)
    store.close()
    raw = path.read_text(encoding="utf-8")
    assert "<script>" not in raw and "&lt;script&gt;" in raw
    text = page.all_text
    assert HOSTILE in text  # shown as written, as text
    assert "branchwatch advises; it does not control." in text
    assert "2026-08-01 00:00 to 2026-09-01 00:00 site time (Europe/Berlin)" in text
    assert "Generated 2026-09-01 07:00." in text  # 05:00 UTC is 07:00 CEST
    # one plot per branch and the by-month chart, all embedded
    assert len(page.images) == len(site.branches) + 1
    assert all(s.startswith("data:image/png;base64,") for s in page.images)
    # the forecast of the open fouling finding, made on 2026-09-01, after the month's end
    # by less than two days: shown, with its dates in site time
    ev = finding_rows()[0]["evidence"]
    day = pd.Timestamp(ev["limit_date_s"], unit="s", tz="UTC").tz_convert("Europe/Berlin")
    assert f"r reaches the cleaning limit 1.50 about {day:%Y-%m-%d}" in text
    # the valve setting of the month is listed, site time
    maint = page.table("time (Europe/Berlin)")
    assert maint[1] == ["2026-08-07 02:00", "B2-compressor", "valve set",
                        "reopened HV-210 fully"]
    assert "monthly-2026-08-fits.csv" in page.links


def test_a_forecast_made_after_the_month_is_not_shown_as_the_months(site: Site) -> None:
    store = filled_store(site)
    try:
        html_text = build_monthly(MonthlyInputs(
            site=site, month="2026-05", fits=store.read_fits(), findings=store.read_findings(),
            maintenance=store.maintenance(), generated=GENERATED))  # fmt: skip
    finally:
        store.close()
    page = _Page()
    page.feed(html_text)
    text = page.all_text
    assert "Forecast: none as of this month." in text
    assert "made on 2026-09-01, after this month" in text
    assert "r reaches the cleaning limit 1.50 about" not in text


def test_fits_csv_beside_the_page_has_the_months_days_in_site_time(site: Site) -> None:
    path, _, store = _page(site)
    store.close()
    rows = list(csv.DictReader(io.StringIO(
        path.with_name("monthly-2026-08-fits.csv").read_text(encoding="utf-8"))))
    assert len(rows) == 31 * len(site.branches)
    assert {r["date"] for r in rows} == {f"2026-08-{d:02d}" for d in range(1, 32)}
    first = next(r for r in rows if r["branch"] == "B1-reactor" and r["date"] == "2026-08-01")
    # the UTC-midnight window of 1 August begins at 02:00 CEST on the same date
    assert first["window_start_utc"] == "2026-08-01T00:00:00+00:00"
    assert float(first["r"]) == pytest.approx(_r(0, _month_days()[0]), abs=1e-6)
    assert float(first["header_pressure_bar"]) == pytest.approx(P_S / 1e5)  # 1 bar = 1e5 Pa


def test_monthly_is_idempotent_on_its_month_and_uses_no_clock(site: Site) -> None:
    path, _, store = _page(site)
    try:
        first = path.read_text(encoding="utf-8")
        again = write_monthly(site, store, month=MONTH, generated=GENERATED)
        assert again == path and again.read_text(encoding="utf-8") == first
        later = write_monthly(site, store, month=MONTH,
                              generated=GENERATED + timedelta(days=1))
        # only the generated line differs
        a, b = first.splitlines(), later.read_text(encoding="utf-8").splitlines()
        assert len(a) == len(b) and sum(x != y for x, y in zip(a, b, strict=True)) == 1
    finally:
        store.close()
    assert sorted(p.name for p in site.report_folder.iterdir()) == [
        "monthly-2026-08-fits.csv", "monthly-2026-08.html"]


def test_morning_report_links_to_the_latest_monthly_report(site: Site) -> None:
    store = filled_store(site)
    try:
        write_monthly(site, store, month="2026-07", generated=GENERATED)
        write_monthly(site, store, month=MONTH, generated=GENERATED)
        # the morning report of 30 August: August is not over, July is the latest; that
        # of 31 August (written on 1 September) covers the month's last day: August
        aug30 = write_report(site, store, day=datetime(2026, 8, 30, 12, tzinfo=UTC),
                             now=GENERATED)
        aug31 = write_report(site, store, day=datetime(2026, 8, 31, 12, tzinfo=UTC),
                             now=GENERATED)
    finally:
        store.close()
    for path, month in ((aug30, "2026-07"), (aug31, "2026-08")):
        page = _Page()
        page.feed(path.read_text(encoding="utf-8"))
        assert f"monthly-{month}.html" in page.links
        assert (path.parent / f"monthly-{month}.html").exists()
    assert latest_monthly(site.report_folder, before=datetime(2026, 7, 1, tzinfo=UTC),
                          site=site) is None


# ---------------------------------------------------------------------------------------
# command line and daemon


def test_report_month_verb_and_its_errors(site: Site, capsys: pytest.CaptureFixture[str]
                                          ) -> None:
    filled_store(site).close()
    assert cli.main(["report", str(site.path), "--month", MONTH]) == 0
    out = capsys.readouterr().out
    assert "monthly report written to" in out and "monthly-2026-08-fits.csv" in out
    assert cli.main(["report", str(site.path), "--month", "2026-13"]) == 2
    err = capsys.readouterr().err.strip()
    assert err == ("branchwatch report: error: --month: month '2026-13' is not a calendar "
                   "month like 2026-08 (YYYY-MM)")
    assert cli.main(["report", str(site.path), "--month", "2031-01"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "--month 2031-01: no fits stored for that month (fits are stored up to 2026-10-06" \
        in err


def test_monthly_job_fires_on_the_first_in_site_time_and_is_made_up_at_start(
        site: Site) -> None:
    trigger = _monthly(site.schedule.report_at, site.timezone)  # 06:15 by default
    # 1 September 06:15 CEST is 04:15 UTC; 1 December 06:15 CET is 05:15 UTC
    assert last_fire_time(trigger, datetime(2026, 9, 20, tzinfo=UTC),
                          horizon=timedelta(days=32)) == datetime(2026, 9, 1, 4, 15, tzinfo=UTC)
    assert last_fire_time(trigger, datetime(2026, 12, 2, tzinfo=UTC),
                          horizon=timedelta(days=32)) == datetime(2026, 12, 1, 5, 15, tzinfo=UTC)
    now = datetime(2026, 9, 20, tzinfo=UTC)
    ran = {"monthly": datetime(2026, 8, 1, 4, 15, tzinfo=UTC)}
    daemon = Daemon(site, {"monthly": lambda: None}, last_ok=ran.get)
    assert daemon.missed("monthly", trigger, now)  # August's run, not September's
    ran["monthly"] = datetime(2026, 9, 1, 4, 16, tzinfo=UTC)
    assert not daemon.missed("monthly", trigger, now)
    # the daemon schedules it by its id, next on the 1st of a month at 06:15 site time
    daemon.scheduler.start(paused=True)
    try:
        daemon.schedule()
        job = daemon.scheduler.get_job("monthly")
        local = job.next_run_time.astimezone(ZoneInfo(site.timezone))
        assert (local.day, local.hour, local.minute) == (1, 6, 15)
    finally:
        daemon.scheduler.shutdown(wait=False)
