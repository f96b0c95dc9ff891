"""The monthly report: the long view of every branch, and what the month's faults cost.

One self-contained HTML page per site-local calendar month, for the engineer and for the
manager they forward it to. Order of the page: the month in brief (energy, cost, branches
past their cleaning limit, findings), every branch at month end, the extra pumping and lost
flow month by month over the long view, then one section per branch — resistance ratio r
per day over the last 12–24 months with its 95 % band, the cleaning limit, the findings and
maintenance entries marked, and the fouling forecast with its interval — then the month's
maintenance log, the files and the method. The month's daily fits go beside the page as
CSV (`month_fits_csv`), in site time and plant units.

What a day costs (`daily_costs`): on each day a resistance finding (fouling or a
restriction) stood open on a branch, the day's fit gives the branch's header pressure,
flow, temperature and r; the flow the branch would carry at the finding's baseline r at
that header pressure, less the flow it carried, is the lost flow, and the extra pressure
drop (r − r_baseline)·ΔP_dyn,clean(Q) at that flow, pumped for 24 h at the site's pump
efficiency, the extra energy (`monitor.cost`, the figures the morning report's findings
carry; it computes in SI, this page shows kWh and m³/h). Days without a usable fit are
not counted, and the page says how many days were.

`build_monthly` is pure: it takes frames read from the store and the time the page is
generated, and returns HTML text; `write_monthly` reads the store and writes the files.
"""

from __future__ import annotations

import html
import logging
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from adapters.base import ResultsStore
from monitor import cost
from monitor.config import BranchConfig, Site
from monitor.plots import BranchHistory, plot_branch_history, plot_monthly_energy, png_data_uri
from monitor.report import CAUTION, _e, _forecast, _head, _local, _num

log = logging.getLogger(__name__)

__all__ = [
    "MonthlyInputs",
    "build_monthly",
    "daily_costs",
    "latest_monthly",
    "month_bounds",
    "month_fits_csv",
    "monthly_name",
    "parse_month",
    "previous_month",
    "write_monthly",
]

#: How many months the long view reaches back at most (from the first fit, if later).
HISTORY_MONTHS = 24
_KIND_TEXT = {"low_flow": "low flow", "restriction": "restriction",
              "back_pressure": "back-pressure change", "instrument": "instrument fault",
              "imbalance": "header imbalance", "fouling": "fouling",
              "backflow_hazard": "back-flow hazard"}
_MONTH = re.compile(r"(\d{4})-(\d{2})")
_CSS = """.kpis {{ display: flex; flex-wrap: wrap; gap: .8em; margin: .8em 0; }}
.kpi {{ border: 1px solid #d5dae4; border-radius: 6px; padding: .45em .8em; min-width: 9em; }}
.kpi b {{ display: block; font-size: 1.35em; }}
.kpi span {{ color: #555e70; font-size: .85em; }}
tr.total td {{ font-weight: 600; border-top: 2px solid #c9cfdb; }}
td.num, td.month {{ white-space: nowrap; }}
""".replace("{{", "{").replace("}}", "}")


def parse_month(text: str) -> str:
    """``"2026-08"`` checked and returned; anything else is a `ValueError` that says so."""
    m = _MONTH.fullmatch(text.strip()) if isinstance(text, str) else None
    if m is None or not 1 <= int(m.group(2)) <= 12:
        raise ValueError(f"month {text!r} is not a calendar month like 2026-08 (YYYY-MM)")
    return f"{int(m.group(1)):04d}-{int(m.group(2)):02d}"


def month_bounds(site: Site, month: str) -> tuple[datetime, datetime]:
    """UTC start and end of the site-local calendar *month* (``YYYY-MM``)."""
    first = pd.Timestamp(parse_month(month) + "-01").tz_localize(site.timezone)
    nxt = (first.tz_localize(None) + pd.offsets.MonthBegin(1)).tz_localize(site.timezone)
    return first.tz_convert("UTC").to_pydatetime(), nxt.tz_convert("UTC").to_pydatetime()


def previous_month(site: Site, now: datetime) -> str:
    """The site-local calendar month before the one *now* falls in."""
    local = pd.Timestamp(now).tz_convert(site.timezone).tz_localize(None)
    return f"{(local.normalize().replace(day=1) - pd.Timedelta(days=1)):%Y-%m}"


def monthly_name(month: str) -> str:
    """File name of the monthly report of *month* (the CSV: ``…-fits.csv``)."""
    return f"monthly-{parse_month(month)}.html"


def history_start(site: Site, month: str) -> datetime:
    """How far back the long view of *month* reaches: `HISTORY_MONTHS` before its end."""
    _, end = month_bounds(site, month)
    local = pd.Timestamp(end).tz_convert(site.timezone).tz_localize(None)
    back = (local - pd.DateOffset(months=HISTORY_MONTHS)).tz_localize(site.timezone)
    return back.tz_convert("UTC").to_pydatetime()


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


# ---------------------------------------------------------------------------------------
# costs


def daily_costs(site: Site, fits: pd.DataFrame, findings: pd.DataFrame) -> pd.DataFrame:
    """`monitor.cost.daily_costs` in the page's units: columns ``branch``,
    ``window_start``, ``window_end``, ``lost_flow_m3h`` [m³/h], ``extra_kwh`` [kWh/d],
    ``costed``."""
    return _days_shown(cost.daily_costs(site, fits, findings))


def _days_shown(days: pd.DataFrame) -> pd.DataFrame:
    return pd.DataFrame({
        "branch": days["branch"], "window_start": days["window_start"],
        "window_end": days["window_end"], "lost_flow_m3h": days["lost_flow_m3s"] * 3600.0,
        "extra_kwh": days["extra_energy_j"] / cost.J_PER_KWH, "costed": days["costed"],
    }, columns=["branch", "window_start", "window_end", "lost_flow_m3h", "extra_kwh",
                "costed"])


def _totals_shown(totals: pd.DataFrame) -> pd.DataFrame:
    """`monitor.cost.monthly_totals` in the page's units (kWh, m³/h)."""
    return pd.DataFrame({
        "month": totals["month"], "branch": totals["branch"],
        "extra_kwh": totals["extra_energy_j"] / cost.J_PER_KWH,
        "lost_flow_m3h": totals["lost_flow_m3s"] * 3600.0, "days": totals["days"],
        "costed": totals["costed"],
    }, columns=["month", "branch", "extra_kwh", "lost_flow_m3h", "days", "costed"])


def _local_month(site: Site, t: pd.Series) -> pd.Series:
    return pd.to_datetime(t).dt.tz_convert(site.timezone).dt.strftime("%Y-%m")


# ---------------------------------------------------------------------------------------
# the page


def build_monthly(inputs: MonthlyInputs) -> str:
    """The HTML text of the monthly report."""
    site, month = inputs.site, parse_month(inputs.month)
    m_start, m_end = month_bounds(site, month)
    fits = inputs.fits
    if not fits.empty:
        fits = fits[pd.to_datetime(fits["window_start"]) < pd.Timestamp(m_end)]
    view = _Month(site, month, pd.Timestamp(m_start), pd.Timestamp(m_end), fits,
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
        *(view.branch_section(b) for b in site.branches),
        view.maintenance_table(),
        _files(inputs.csv_name, label),
        _method(site),
        "</body></html>",
    ]
    return "\n".join(p for p in parts if p)


def _money(site: Site, kwh: float) -> str:
    money = cost.energy_cost(site, kwh * cost.J_PER_KWH)
    if money is None or site.energy_price is None:
        return "—"
    return f"{money:,.0f} {site.energy_price.currency}"


def _open_at(f: pd.DataFrame, when: pd.Timestamp) -> pd.DataFrame:
    """Findings that started before *when* and had not ended by then."""
    if f.empty:
        return f
    end = pd.to_datetime(f["end"], utc=True)
    return f[(pd.to_datetime(f["start"], utc=True) < when) & (end.isna() | (end > when))]


class _Month:
    """The month's view of the store's frames, section by section."""

    def __init__(self, site: Site, month: str, start: pd.Timestamp, end: pd.Timestamp,
                 fits: pd.DataFrame, findings: pd.DataFrame, maintenance: pd.DataFrame,
                 generated: pd.Timestamp) -> None:
        self.site, self.month, self.start, self.end = site, month, start, end
        self.fits, self.generated = fits, generated
        self.findings = findings if findings.empty else findings[
            pd.to_datetime(findings["start"], utc=True) < end]
        self.maintenance = maintenance if maintenance.empty else maintenance[
            pd.to_datetime(maintenance["time"], utc=True) < end]
        si_days = cost.daily_costs(site, fits, self.findings)
        self.days = _days_shown(si_days)
        self.totals = _totals_shown(cost.monthly_totals(site, si_days))

    # -- helpers -------------------------------------------------------------------------
    def _in_month(self, frame: pd.DataFrame, col: str) -> pd.DataFrame:
        if frame.empty:
            return frame
        t = pd.to_datetime(frame[col], utc=True)
        return frame[(t >= self.start) & (t < self.end)]

    def _branch_fits(self, name: str) -> pd.DataFrame:
        f = self.fits
        return f if f.empty else f[(f["branch"] == name) & f["r"].notna()]

    def _month_total(self, month: str) -> tuple[float, float, int]:
        """(extra kWh, mean lost flow summed over branches [m³/h], costed branch-days)."""
        t = self.totals[self.totals["month"] == month] if not self.totals.empty else \
            self.totals
        if t.empty:
            return 0.0, 0.0, 0
        return float(t["extra_kwh"].sum()), float(t["lost_flow_m3h"].sum()), \
            int(t["costed"].sum())

    def _days_in_month(self) -> int:
        return round((self.end - self.start) / pd.Timedelta(days=1))

    # -- sections ------------------------------------------------------------------------
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
        kwh, lost, _ = self._month_total(self.month)
        prev = f"{pd.Timestamp(self.month + '-01') - pd.Timedelta(days=1):%Y-%m}"
        kwh_prev, _, _ = self._month_total(prev)
        year = self._months()[-12:]
        year_kwh = sum(self._month_total(m)[0] for m in year)
        past = [b for b in site.branches if self._last_r(b.name) is not None
                and float(self._last_r(b.name) or 0.0) >= b.cleaning_limit]
        new_f = self._in_month(self.findings, "start")
        open_end = _open_at(self.findings, self.end)
        kpis = [
            (f"{kwh:,.0f} kWh", "extra pumping this month"),
            (_money(site, kwh), f"its cost at {site.energy_price}" if site.energy_price
             else "no energy price set ([cost] energy_price)"),
            (f"{year_kwh:,.0f} kWh" if site.energy_price is None else
             _money(site, year_kwh), f"extra pumping, {len(year)} months to {label}"),
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
        for name, r in self._forecasts().items():
            if any(b.name == name for b in past) or self._forecast_after(r):
                continue
            text = _forecast_sentence(site, r)
            if text:
                lines.append(f"{name}: {text}")
        if not lines:
            lines.append("No branch lost flow or cost extra pumping to a resistance finding "
                         "this month.")
        items = "".join(f"<li>{_e(x)}</li>" for x in lines)
        return f"<h2>{_e(label)} in brief</h2><div class=kpis>{boxes}</div><ul>{items}</ul>"

    def _last_r(self, name: str) -> float | None:
        part = self._in_month(self._branch_fits(name), "window_start")
        return None if part.empty else float(part.iloc[-1]["r"])

    def _past_line(self, b: BranchConfig) -> str:
        """'B1-reactor: r 1.65 at month end, at or past its cleaning limit 1.50 on 31 of
        31 days fitted (first on 2026-07-31); its extra pumping cost 436 EUR this month.'"""
        part = self._in_month(self._branch_fits(b.name), "window_start")
        over = int((part["r"] >= b.cleaning_limit).sum())
        # r scattering about the limit has no date it passed it
        since = self._past_since(b) if over >= 0.8 * len(part) else ""
        t = self.totals
        mine = t[(t["month"] == self.month) & (t["branch"] == b.name)] if not t.empty else t
        kwh = float(mine["extra_kwh"].sum()) if not mine.empty else 0.0
        cost = ""
        if kwh > 0:
            money = _money(self.site, kwh)
            cost = (f"; its extra pumping took {kwh:,.0f} kWh this month"
                    + (f" ({money})" if self.site.energy_price else ""))
        return (f"{b.name}: r {float(part.iloc[-1]['r']):.2f} at month end, at or past its "
                f"cleaning limit {b.cleaning_limit:.2f} on {over} of {len(part)} days fitted"
                + (f" (over it since {since})" if since else "") + cost + ".")

    def _past_since(self, b: BranchConfig) -> str:
        """The first day of the last run of days whose 7-day median of r stands at or past
        the cleaning limit (a median, so that scatter around the limit does not move it)."""
        part = self._branch_fits(b.name)
        med = part["r"].rolling(7, min_periods=1).median()
        above = (med >= b.cleaning_limit).to_numpy()
        if not above.size or not above[-1]:
            return ""
        below = np.flatnonzero(~above)
        first = 0 if below.size == 0 else int(below[-1]) + 1
        when = part.iloc[first]["window_start"]
        return f"{pd.Timestamp(when).tz_convert(self.site.timezone):%Y-%m-%d}"

    def _forecast_after(self, row: Mapping[str, Any]) -> bool:
        """True when the finding's forecast was made after the month (the store keeps only
        the latest): it does not describe the month."""
        made = _forecast_made(row)
        return made is not None and made > self.end + pd.Timedelta(days=2)

    def _forecasts(self) -> dict[str, dict[str, Any]]:
        """The fouling finding open at month end, per branch (the newest)."""
        out: dict[str, dict[str, Any]] = {}
        f = _open_at(self.findings, self.end)
        if f.empty:
            return out
        for r in f[f["kind"] == "fouling"].sort_values("start").to_dict(orient="records"):
            out[str(r["branch"])] = {str(k): v for k, v in r.items()}
        return out

    def branch_table(self) -> str:
        site = self.site
        rows = []
        tot_kwh = tot_lost = 0.0
        for b in site.branches:
            part = self._in_month(self._branch_fits(b.name), "window_start")
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
                f"<td class=num>{len(part)} / {self._days_in_month()}</td>"
                f"<td class=num>{lost:.1f}</td><td class=num>{kwh:,.0f}</td>"
                f"<td class=num>{_e(_money(site, kwh))}</td></tr>")
        rows.append(f"<tr class=total><td>all branches</td><td colspan=5></td>"
                    f"<td class=num>{tot_lost:.1f}</td><td class=num>{tot_kwh:,.0f}</td>"
                    f"<td class=num>{_e(_money(site, tot_kwh))}</td></tr>")
        return ("<h2>Branches at month end</h2><table><tr><th>branch</th>"
                "<th class=num>r (last day)</th><th class=num>95 % interval</th>"
                "<th class=num>change in month</th><th class=num>cleaning limit</th>"
                "<th class=num>days fitted</th><th class=num>lost flow [m³/h]</th>"
                "<th class=num>extra pumping [kWh]</th><th class=num>cost</th></tr>"
                + "".join(rows) + "</table><p class=ev>r = 1.00 is the branch as designed and "
                "clean; 1.40 means 40 % more hydraulic resistance. Lost flow is the mean over "
                "the days fitted; extra pumping and cost are summed over them.</p>")

    def _months(self) -> list[str]:
        """The local months of the long view, oldest first, ending with the report month."""
        first = pd.Timestamp(self.month + "-01")
        if not self.fits.empty:
            earliest = pd.to_datetime(self.fits["window_start"]).min()
            first_data = pd.Timestamp(
                f"{pd.Timestamp(earliest).tz_convert(self.site.timezone):%Y-%m}-01")
            back = first - pd.DateOffset(months=HISTORY_MONTHS - 1)
            first = max(first_data, back)
        return [f"{d:%Y-%m}" for d in pd.date_range(first, pd.Timestamp(self.month + "-01"),
                                                    freq="MS")]

    def by_month(self) -> str:
        site = self.site
        months = self._months()
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
            kwh, lost, costed = self._month_total(m)
            fitted = 0
            if not self.days.empty:
                fitted = int((_local_month(site, self.days["window_start"]) == m).sum())
            mark = " class=total" if m == self.month else ""
            rows.append(f"<tr{mark}><td class=month>{_e(m)}</td><td class=num>{kwh:,.0f}</td>"
                        f"<td class=num>{_e(_money(site, kwh))}</td>"
                        f"<td class=num>{lost:.1f}</td><td class=num>{costed}</td>"
                        f"<td class=num>{fitted}</td></tr>")
        return ("<h2>Extra pumping and lost flow by month</h2>"
                f"<img alt='{_e(unit)} per month and branch' src='{img}'>"
                "<table><tr><th>month</th><th class=num>extra pumping [kWh]</th>"
                "<th class=num>cost</th><th class=num>lost flow [m³/h, sum of branch means]"
                "</th><th class=num>branch-days with a resistance finding</th>"
                "<th class=num>branch-days fitted</th></tr>" + "".join(rows) + "</table>")

    def branch_section(self, b: BranchConfig) -> str:
        site, tz = self.site, self.site.timezone
        part = self._branch_fits(b.name)

        def local(t: Any) -> pd.Timestamp:
            return pd.Timestamp(t).tz_convert(tz).tz_localize(None)

        start = pd.Timestamp(self._months()[0] + "-01")
        end = local(self.end)
        frame = pd.DataFrame({
            "t": [local(t) for t in part["window_end"]] if not part.empty else [],
            "r": part["r"].to_numpy(float) if not part.empty else [],
            "r_low": part["r_low"].to_numpy(float) if not part.empty else [],
            "r_high": part["r_high"].to_numpy(float) if not part.empty else [],
        })
        mine = self.findings[self.findings["branch"] == b.name] if not self.findings.empty \
            else self.findings
        marks = []
        for r in mine.sort_values("start").to_dict(orient="records") if not mine.empty else []:
            e = r.get("end")
            ended = None if e is None or pd.isna(e) or pd.Timestamp(e) >= self.end else local(e)
            marks.append((str(r["kind"]), local(r["start"]), ended,
                          _KIND_TEXT.get(str(r["kind"]), str(r["kind"]))))
        maint = self.maintenance[self.maintenance["branch"] == b.name] \
            if not self.maintenance.empty else self.maintenance
        m_marks = [(local(r["time"]), str(r["kind"]).replace("_", " "))
                   for r in maint.to_dict(orient="records")] if not maint.empty else []
        fc = self._forecasts().get(b.name)
        late = fc is not None and self._forecast_after(fc)
        fan, note = self._fan(None if late else fc, part, local)
        if fan is not None:
            end = max(end, min(local(self.end) + pd.DateOffset(months=6),
                               fan[0] + pd.Timedelta(days=_fan_days(fan, b.cleaning_limit))))
        quiet = not marks and not m_marks and fan is None
        fig = plot_branch_history(BranchHistory(
            height_in=2.0 if quiet else 3.1,
            name=f"{b.name} — {b.description}", fits=frame, cleaning_limit=b.cleaning_limit,
            start=start, end=end, month=(local(self.start), local(self.end)),
            findings=marks, maintenance=m_marks, forecast=fan))
        text = [self._fit_gaps(b)]
        if fc is not None and late:
            made = _forecast_made(fc)
            text.append("<p class=forecast><b>Forecast:</b> none as of this month. The store "
                        "keeps only the latest forecast, made on "
                        f"{_local(site, made)[:10]}, after this month; the monthly report "
                        "written on the 1st of the next month carries the forecast of its "
                        "time.</p>")
        elif fc is not None:
            text.append(_forecast(site, fc) + (f"<p class=ev>{_e(note)}</p>" if note else ""))
        month_f = _open_at(mine, self.end) if not mine.empty else mine
        closed = self._in_month(mine[mine["end"].notna()], "end") if not mine.empty else mine
        shown = pd.concat([month_f, closed]) if not closed.empty else month_f
        for r in shown.to_dict(orient="records") if not shown.empty else []:
            e = r.get("end")
            state = "open at month end" if e is None or pd.isna(e) or \
                pd.Timestamp(e) >= self.end else f"ended {_local(site, e)}"
            text.append(f"<p><span class=kind>{_e(_KIND_TEXT.get(str(r['kind']), r['kind']))}"
                        f"</span>{_e(r['message'])} <span class=ev>(since "
                        f"{_local(site, r['start'])}, {_e(state)}, confidence "
                        f"{float(r['confidence']):.0%})</span></p>")
        if len(text) == 1:
            text.append("<p class=ev>No finding on this branch this month.</p>")
        return (f"<h2>{_e(b.name)}</h2>"
                f"<img alt='resistance ratio of {_e(b.name)} per day' src='"
                f"{png_data_uri(fig)}'>" + "".join(text))

    def _fan(self, fc: dict[str, Any] | None, part: pd.DataFrame, local: Any
             ) -> tuple[tuple[pd.Timestamp, float, float, float, float] | None, str]:
        """The forecast fan (from the finding's last evaluation) and a note when it is
        not drawn, or was made after the month."""
        if fc is None:
            return None, ""
        ev = fc.get("evidence") or {}
        r0, slope = _num(ev, "r_now"), _num(ev, "slope_per_day")
        when, days = _num(ev, "limit_date_s"), _num(ev, "days_to_limit")
        if r0 is None or slope is None or when is None or days is None or slope <= 0:
            return None, ""
        t0 = pd.Timestamp(when - days * 86400.0, unit="s", tz="UTC")
        lo = _num(ev, "slope_low_per_day") or 0.0
        hi = _num(ev, "slope_high_per_day") or slope
        return (local(t0), r0, slope, lo, hi), ""

    def _fit_gaps(self, b: BranchConfig) -> str:
        """'22 of 31 days without a usable fit (too few samples 22).' or ''."""
        f = self.fits
        part = self._in_month(f[f["branch"] == b.name], "window_start") if not f.empty else f
        usable = int(part["r"].notna().sum()) if not part.empty else 0
        days = self._days_in_month()
        if usable >= days:
            return ""
        why = part[part["r"].isna()]["status"].astype(str).str.replace("_", " ") \
            if not part.empty else pd.Series(dtype=str)
        counts = ", ".join(f"{k} {v}" for k, v in why.value_counts().items())
        missing = days - len(part)
        if missing > 0:
            counts = ", ".join(x for x in (counts, f"no window analysed {missing}") if x)
        return (f"<p class=ev>{days - usable} of {days} days without a usable fit"
                + (f" ({_e(counts)})" if counts else "") + ": the figures of this branch "
                "count the days fitted only.</p>")

    def maintenance_table(self) -> str:
        site = self.site
        m = self._in_month(self.maintenance, "time")
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


def _forecast_made(row: Mapping[str, Any]) -> pd.Timestamp | None:
    """When a fouling finding's forecast was made (its last evaluation), from evidence."""
    ev = row.get("evidence") or {}
    when, days = _num(ev, "limit_date_s"), _num(ev, "days_to_limit")
    if when is None or days is None:
        return None
    return pd.Timestamp(when - days * 86400.0, unit="s", tz="UTC")


def _fan_days(fan: tuple[pd.Timestamp, float, float, float, float], limit: float) -> float:
    _, r0, slope, _, _ = fan
    return max((limit - r0) / slope, 0.0) + 10.0


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


# ---------------------------------------------------------------------------------------
# the CSV and the files


_CSV_COLUMNS = ("date", "branch", "r", "r_low", "r_high", "status", "samples",
                "mean_flow_m3h", "header_pressure_bar", "temperature_c", "lost_flow_m3h",
                "extra_kwh", "window_start_utc", "window_end_utc")


def month_fits_csv(site: Site, month: str, fits: pd.DataFrame, findings: pd.DataFrame
                   ) -> str:
    """The month's daily fits as CSV text: site-local date, plant units, the day's cost."""
    start, end = month_bounds(site, month)
    f = fits
    if not f.empty:
        ws = pd.to_datetime(f["window_start"], utc=True)
        f = f[(ws >= pd.Timestamp(start)) & (ws < pd.Timestamp(end))]
    if f.empty:
        return ",".join(_CSV_COLUMNS) + "\n"
    days = daily_costs(site, f, findings)
    key = ["branch", "window_start"]
    out = f.merge(days[[*key, "lost_flow_m3h", "extra_kwh"]], on=key, how="left")
    ws = pd.to_datetime(out["window_start"], utc=True)
    frame = pd.DataFrame({
        "date": ws.dt.tz_convert(site.timezone).dt.strftime("%Y-%m-%d"),
        "branch": out["branch"], "r": out["r"], "r_low": out["r_low"],
        "r_high": out["r_high"], "status": out["status"], "samples": out["samples"],
        "mean_flow_m3h": _column(out, "mean_flow_m3s") * 3600.0,
        "header_pressure_bar": _column(out, "header_pressure_pa") / 1e5,
        "temperature_c": _column(out, "temperature_c"),
        "lost_flow_m3h": out["lost_flow_m3h"], "extra_kwh": out["extra_kwh"],
        "window_start_utc": ws.map(lambda t: t.isoformat()),
        "window_end_utc": pd.to_datetime(out["window_end"], utc=True).map(
            lambda t: t.isoformat()),
    })
    order = {b.name: i for i, b in enumerate(site.branches)}
    frame = frame.sort_values(["date", "branch"], key=lambda c: c.map(order)
                              if c.name == "branch" else c)
    return str(frame.to_csv(index=False, float_format="%.6g"))


def _column(frame: pd.DataFrame, name: str) -> pd.Series:
    """*name* as floats (NaN where absent)."""
    if name not in frame.columns:
        return pd.Series(np.nan, index=frame.index)
    return pd.to_numeric(frame[name], errors="coerce")


def write_monthly(site: Site, store: ResultsStore, *, month: str, generated: datetime
                  ) -> Path:
    """Write the monthly report of *month* and its fits CSV; returns the HTML's path.

    Named by the month, so a second run for the same month replaces both (idempotent).
    """
    month = parse_month(month)
    _, end = month_bounds(site, month)
    from monitor.windows import current_fits

    fits = current_fits(site, store.read_fits(start=history_start(site, month), end=end))
    findings = store.read_findings()
    maintenance = store.maintenance()
    folder = site.report_folder
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / monthly_name(month)
    csv_path = path.with_name(path.stem + "-fits.csv")
    html_text = build_monthly(MonthlyInputs(
        site=site, month=month, fits=fits, findings=findings, maintenance=maintenance,
        generated=generated, csv_name=csv_path.name))
    for target, text in ((csv_path, month_fits_csv(site, month, fits, findings)),
                         (path, html_text)):
        tmp = target.with_suffix(".tmp")
        tmp.write_text(text, encoding="utf-8")
        tmp.replace(target)
    log.info("monthly report for %s written to %s (fits in %s)", month, path, csv_path.name)
    return path


def latest_monthly(folder: Path, *, before: datetime, site: Site) -> tuple[str, str] | None:
    """(file name, month) of the newest monthly report in *folder* whose month ended by
    *before* (UTC); None when there is none."""
    best: tuple[str, str] | None = None
    for p in folder.glob("monthly-*.html") if folder.is_dir() else []:
        m = re.fullmatch(r"monthly-(\d{4}-\d{2})\.html", p.name)
        if m is None:
            continue
        try:
            _, end = month_bounds(site, m.group(1))
        except ValueError:
            continue
        if end <= before and (best is None or m.group(1) > best[1]):
            best = (p.name, m.group(1))
    return best
