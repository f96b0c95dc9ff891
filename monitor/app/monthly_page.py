"""The monthly report's page: the month in brief and its tables.

One self-contained HTML page per site-local calendar month. Order of the page: the month
in brief (energy, cost, branches past their cleaning limit, findings), every branch at
month end, the extra pumping and lost flow month by month over the long view, then one
section per branch (`monitor.app.monthly_branch`), then the month's maintenance log, the
files and the method. `build_monthly` is pure: frames read from the store and the time
the page is generated in, HTML text out.
"""

from __future__ import annotations

import html
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd

from monitor.app.monthly_branch import branch_section
from monitor.app.monthly_view import (
    MonthView,
    local_month,
    money_text,
    month_bounds,
    open_at,
    parse_month,
)
from monitor.app.plots import plot_monthly_energy, png_data_uri
from monitor.app.report import CAUTION
from monitor.app.report import escape as _e
from monitor.app.report import forecast_html as _forecast
from monitor.app.report import local_time as _local
from monitor.app.report import page_head as _head
from monitor.site.config import BranchConfig, Site

__all__ = ["MonthlyInputs", "build_monthly"]

_CSS = """.kpis {{ display: flex; flex-wrap: wrap; gap: .8em; margin: .8em 0; }}
.kpi {{ border: 1px solid #d5dae4; border-radius: 6px; padding: .45em .8em; min-width: 9em; }}
.kpi b {{ display: block; font-size: 1.35em; }}
.kpi span {{ color: #555e70; font-size: .85em; }}
tr.total td {{ font-weight: 600; border-top: 2px solid #c9cfdb; }}
td.num, td.month {{ white-space: nowrap; }}
""".replace("{{", "{").replace("}}", "}")


@dataclass(frozen=True)
class MonthlyInputs:
    """What the monthly report is built from (frames as the results store returns them)."""

    site: Site
    month: str  # "YYYY-MM", site-local calendar month
    fits: pd.DataFrame  # fits of the long view, window start before the month's end
    findings: pd.DataFrame
    maintenance: pd.DataFrame  # entries in force (withdrawn ones are not marked)
    generated: datetime
    csv_name: str | None = None  # the daily-fits CSV beside the page, for the link


def build_monthly(inputs: MonthlyInputs) -> str:
    """The HTML text of the monthly report."""
    site, month = inputs.site, parse_month(inputs.month)
    m_start, m_end = month_bounds(site, month)
    fits = inputs.fits
    if not fits.empty:
        fits = fits[pd.to_datetime(fits["window_start"]) < pd.Timestamp(m_end)]
    view = _MonthPage(site, month, pd.Timestamp(m_start), pd.Timestamp(m_end), fits,
                      inputs.findings, inputs.maintenance, pd.Timestamp(inputs.generated))
    label = f"{pd.Timestamp(month + '-01'):%B %Y}"
    parts = [
        _head(f"{site.name} — {label}", _CSS),
        f"<h1>{_e(site.name)}</h1>",
        f"<p class=sub>Monthly report for {_e(label)}: {_local(site, m_start)} to "
        f"{_local(site, m_end)} site time ({_e(site.timezone)}). Generated "
        f"{_local(site, inputs.generated)}.</p>",
        view.in_progress(),
        f"<p class=caution>{_e(CAUTION)}</p>",
        view.brief(label),
        view.branch_table(),
        view.by_month(),
        *(branch_section(view, b) for b in site.branches),
        view.maintenance_table(),
        _files(inputs.csv_name, label),
        _method(site),
        "</body></html>",
    ]
    return "\n".join(p for p in parts if p)


class _MonthPage(MonthView):
    """The month-wide sections of the page."""

    def in_progress(self) -> str:
        last = pd.to_datetime(self.fits["window_end"], utc=True).max() \
            if not self.fits.empty else None
        if self.generated >= self.end or (last is not None and last >= self.end):
            return ""
        return (f"<p class=stale>This month is not over: the figures cover the data up to "
                f"{_local(self.site, self.generated)}. The complete report is written on "
                "the 1st of next month.</p>")

    def brief(self, label: str) -> str:
        site = self.site
        kwh, lost, _ = self.month_total(self.month)
        prev = f"{pd.Timestamp(self.month + '-01') - pd.Timedelta(days=1):%Y-%m}"
        kwh_prev, _, _ = self.month_total(prev)
        year = self.months()[-12:]
        year_kwh = sum(self.month_total(m)[0] for m in year)
        past = [b for b in site.branches if self.last_r(b.name) is not None
                and float(self.last_r(b.name) or 0.0) >= b.cleaning_limit]
        new_f = self.in_month(self.findings, "start")
        open_end = open_at(self.findings, self.end)
        kpis = [
            (f"{kwh:,.0f} kWh", "extra pumping this month"),
            (money_text(site, kwh), f"its cost at {site.energy_price}" if site.energy_price
             else "no energy price set ([cost] energy_price)"),
            (f"{year_kwh:,.0f} kWh" if site.energy_price is None else
             money_text(site, year_kwh), f"extra pumping, {len(year)} months to {label}"),
            (f"{lost:.1f} m³/h", "cooling water lost (mean, all branches)"),
            (f"{len(past)} of {len(site.branches)}", "branches at or past cleaning limit"),
            (f"{len(open_end)} open · {len(new_f)} new", "findings at month end"),
        ]
        boxes = "".join(f"<div class=kpi><b>{_e(v)}</b><span>{_e(t)}</span></div>"
                        for v, t in kpis)
        lines = []
        if kwh_prev > 0 or kwh > 0:
            lines.append(f"Extra pumping {kwh:,.0f} kWh against {kwh_prev:,.0f} kWh in "
                         f"{pd.Timestamp(prev + '-01'):%B}.")
        for b in past:
            lines.append(self._past_line(b))
        for name, r in self.forecasts().items():
            if any(b.name == name for b in past) or self.forecast_after(r):
                continue
            text = _forecast_sentence(site, r)
            if text:
                lines.append(f"{name}: {text}")
        if not lines:
            lines.append("No branch lost flow or cost extra pumping to a resistance finding "
                         "this month.")
        items = "".join(f"<li>{_e(x)}</li>" for x in lines)
        return f"<h2>{_e(label)} in brief</h2><div class=kpis>{boxes}</div><ul>{items}</ul>"

    def _past_line(self, b: BranchConfig) -> str:
        """'B1-reactor: r 1.65 at month end, at or past its cleaning limit 1.50 on 31 of
        31 days fitted (first on 2026-07-31); its extra pumping cost 436 EUR this month.'"""
        part = self.in_month(self.branch_fits(b.name), "window_start")
        over = int((part["r"] >= b.cleaning_limit).sum())
        # r scattering about the limit has no date it passed it
        since = self._past_since(b) if over >= 0.8 * len(part) else ""
        t = self.totals
        mine = t[(t["month"] == self.month) & (t["branch"] == b.name)] if not t.empty else t
        kwh = float(mine["extra_kwh"].sum()) if not mine.empty else 0.0
        cost = ""
        if kwh > 0:
            money = money_text(self.site, kwh)
            cost = (f"; its extra pumping took {kwh:,.0f} kWh this month"
                    + (f" ({money})" if self.site.energy_price else ""))
        return (f"{b.name}: r {float(part.iloc[-1]['r']):.2f} at month end, at or past its "
                f"cleaning limit {b.cleaning_limit:.2f} on {over} of {len(part)} days fitted"
                + (f" (over it since {since})" if since else "") + cost + ".")

    def _past_since(self, b: BranchConfig) -> str:
        """The first day of the last run of days whose 7-day median of r stands at or past
        the cleaning limit (a median, so that scatter around the limit does not move it)."""
        part = self.branch_fits(b.name)
        med = part["r"].rolling(7, min_periods=1).median()
        above = (med >= b.cleaning_limit).to_numpy()
        if not above.size or not above[-1]:
            return ""
        below = np.flatnonzero(~above)
        first = 0 if below.size == 0 else int(below[-1]) + 1
        when = part.iloc[first]["window_start"]
        return f"{pd.Timestamp(when).tz_convert(self.site.timezone):%Y-%m-%d}"

    def branch_table(self) -> str:
        site = self.site
        rows = []
        tot_kwh = tot_lost = 0.0
        for b in site.branches:
            part = self.in_month(self.branch_fits(b.name), "window_start")
            t = self.totals
            mine = t[(t["month"] == self.month) & (t["branch"] == b.name)] if not t.empty \
                else t
            kwh = float(mine["extra_kwh"].sum()) if not mine.empty else 0.0
            lost = float(mine["lost_flow_m3h"].sum()) if not mine.empty else 0.0
            tot_kwh, tot_lost = tot_kwh + kwh, tot_lost + lost
            if part.empty:
                rows.append(f"<tr><td>{_e(b.name)}</td><td colspan=8>no usable fit this "
                            "month</td></tr>")
                continue
            first, last = part.iloc[0], part.iloc[-1]
            r = float(last["r"])
            cls = "num over" if r >= b.cleaning_limit else "num"
            rows.append(
                f"<tr><td>{_e(b.name)}<br><span class=ev>{_e(b.description)}</span></td>"
                f"<td class='{cls}'>{r:.3f}</td><td class=num>{float(last['r_low']):.3f}–"
                f"{float(last['r_high']):.3f}</td>"
                f"<td class=num>{_signed(r - float(first['r']))}</td>"
                f"<td class=num>{b.cleaning_limit:.2f}</td>"
                f"<td class=num>{len(part)} / {self.days_in_month()}</td>"
                f"<td class=num>{lost:.1f}</td><td class=num>{kwh:,.0f}</td>"
                f"<td class=num>{_e(money_text(site, kwh))}</td></tr>")
        rows.append(f"<tr class=total><td>all branches</td><td colspan=5></td>"
                    f"<td class=num>{tot_lost:.1f}</td><td class=num>{tot_kwh:,.0f}</td>"
                    f"<td class=num>{_e(money_text(site, tot_kwh))}</td></tr>")
        return ("<h2>Branches at month end</h2><table><tr><th>branch</th>"
                "<th class=num>r (last day)</th><th class=num>95 % interval</th>"
                "<th class=num>change in month</th><th class=num>cleaning limit</th>"
                "<th class=num>days fitted</th><th class=num>lost flow [m³/h]</th>"
                "<th class=num>extra pumping [kWh]</th><th class=num>cost</th></tr>"
                + "".join(rows) + "</table><p class=ev>r = 1.00 is the branch as designed and "
                "clean; 1.40 means 40 % more hydraulic resistance. Lost flow is the mean over "
                "the days fitted; extra pumping and cost are summed over them.</p>")

    def by_month(self) -> str:
        site = self.site
        months = self.months()
        by_branch: dict[str, Sequence[float]] = {}
        price = site.energy_price.per_kwh if site.energy_price else 1.0
        for b in site.branches:
            t = self.totals[self.totals["branch"] == b.name] if not self.totals.empty \
                else self.totals
            got = dict(zip(t["month"], t["extra_kwh"], strict=True)) if not t.empty else {}
            by_branch[b.name] = [float(got.get(m, 0.0)) * price for m in months]
        unit = (f"extra pumping cost [{site.energy_price.currency}]" if site.energy_price
                else "extra pumping [kWh]")
        img = png_data_uri(plot_monthly_energy(months, by_branch, unit=unit))
        rows = []
        for m in reversed(months):
            kwh, lost, costed = self.month_total(m)
            fitted = 0
            if not self.days.empty:
                fitted = int((local_month(site, self.days["window_start"]) == m).sum())
            mark = " class=total" if m == self.month else ""
            rows.append(f"<tr{mark}><td class=month>{_e(m)}</td><td class=num>{kwh:,.0f}</td>"
                        f"<td class=num>{_e(money_text(site, kwh))}</td>"
                        f"<td class=num>{lost:.1f}</td><td class=num>{costed}</td>"
                        f"<td class=num>{fitted}</td></tr>")
        return ("<h2>Extra pumping and lost flow by month</h2>"
                f"<img alt='{_e(unit)} per month and branch' src='{img}'>"
                "<table><tr><th>month</th><th class=num>extra pumping [kWh]</th>"
                "<th class=num>cost</th><th class=num>lost flow [m³/h, sum of branch means]"
                "</th><th class=num>branch-days with a resistance finding</th>"
                "<th class=num>branch-days fitted</th></tr>" + "".join(rows) + "</table>")

    def maintenance_table(self) -> str:
        site = self.site
        m = self.in_month(self.maintenance, "time")
        head = "<h2>Maintenance logged this month</h2>"
        if m.empty:
            return head + ("<p>None. A cleaning or valve change that was not logged shows in "
                           "the trends as a fall of r; record it with <code>branchwatch log"
                           "</code> so the diagnosis starts a new baseline.</p>")
        rows = "".join(
            f"<tr><td>{_local(site, r['time'])}</td><td>{_e(r['branch'])}</td>"
            f"<td>{_e(str(r['kind']).replace('_', ' '))}</td><td>{_e(r.get('note') or '')}"
            "</td></tr>" for r in m.sort_values("time").to_dict(orient="records"))
        return (head + f"<table><tr><th>time ({_e(site.timezone)})</th><th>branch</th>"
                f"<th>work</th><th>note</th></tr>{rows}</table>")


def _signed(x: float) -> str:
    """'+0.012', '-0.011', and '+0.000' (never '-0.000')."""
    return f"{round(x, 3) + 0.0:+.3f}"


def _forecast_sentence(site: Site, row: Mapping[str, Any]) -> str:
    """The forecast as plain text (the morning report's wording, without markup)."""
    text = re.sub(r"<[^>]+>", "", _forecast(site, row))
    return _unescape(text).removeprefix("Forecast: ").strip()


def _unescape(text: str) -> str:
    return html.unescape(text)


def _files(csv_name: str | None, label: str) -> str:
    if csv_name is None:
        return ""
    return (f"<h2>Files</h2><p>The daily fits of {_e(label)}, one row per branch and day in "
            f"site time and plant units: <a href='{_e(csv_name)}'>{_e(csv_name)}</a>.</p>")


def _method(site: Site) -> str:
    price = (f"at the configured price of {site.energy_price}" if site.energy_price else
             "(no price configured: add [cost] energy_price to the site file, e.g. "
             "\"0.14 EUR/kWh\")")
    return (
        "<h2>How these figures are made</h2><p class=ev>r is fitted each day to the "
        "branch's physics model from the steady samples of the day (see the morning report). "
        "On each day a fouling or restriction finding stood open on a branch, the day's "
        "mean header pressure, flow and temperature give the flow the branch would carry at "
        "the finding's baseline r, and the extra pressure drop its raised r takes at the "
        "flow it carried; that drop, pumped around the clock at the pump efficiency of the "
        f"site file ({site.pump_efficiency:.2f}), is the extra energy, priced {_e(price)}. "
        "Days without a usable fit are not counted (see the days-fitted columns). Forecasts "
        "are those of the fouling findings: the Theil–Sen rate of rise, its interval widened "
        "for autocorrelation (Hamed–Rao), extended to the cleaning limit.</p>")
