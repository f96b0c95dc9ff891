"""One branch's section of the monthly report: the long view of its resistance ratio.

r per day over the last 12–24 months with its 95 % band, the cleaning limit, the findings
and maintenance entries marked, the fouling forecast's fan, the days without a usable fit,
and the findings open at month end or ended in it. Each section reads the month through
`monitor.app.monthly_view.MonthView`; `monitor.app.monthly_page` puts them on the page.
"""

from __future__ import annotations

from typing import Any

import pandas as pd

from monitor.app.monthly_view import MonthView, forecast_made, open_at
from monitor.app.plots import BranchHistory, plot_branch_history, png_data_uri
from monitor.app.report import escape as _e
from monitor.app.report import evidence_number as _num
from monitor.app.report import forecast_html as _forecast
from monitor.app.report import local_time as _local
from monitor.site.config import BranchConfig

__all__ = ["branch_section"]

_KIND_TEXT = {"low_flow": "low flow", "restriction": "restriction",
              "back_pressure": "back-pressure change", "instrument": "instrument fault",
              "imbalance": "header imbalance", "fouling": "fouling",
              "backflow_hazard": "back-flow hazard"}


def branch_section(view: MonthView, b: BranchConfig) -> str:
    """The section of branch *b*: its plot of r over the long view, then the words."""
    site, tz = view.site, view.site.timezone
    part = view.branch_fits(b.name)

    def local(t: Any) -> pd.Timestamp:
        return pd.Timestamp(t).tz_convert(tz).tz_localize(None)

    start = pd.Timestamp(view.months()[0] + "-01")
    end = local(view.end)
    frame = pd.DataFrame({
        "t": [local(t) for t in part["window_end"]] if not part.empty else [],
        "r": part["r"].to_numpy(float) if not part.empty else [],
        "r_low": part["r_low"].to_numpy(float) if not part.empty else [],
        "r_high": part["r_high"].to_numpy(float) if not part.empty else [],
    })
    mine = view.findings[view.findings["branch"] == b.name] if not view.findings.empty \
        else view.findings
    marks = []
    for r in mine.sort_values("start").to_dict(orient="records") if not mine.empty else []:
        e = r.get("end")
        ended = None if e is None or pd.isna(e) or pd.Timestamp(e) >= view.end else local(e)
        marks.append((str(r["kind"]), local(r["start"]), ended,
                      _KIND_TEXT.get(str(r["kind"]), str(r["kind"]))))
    maint = view.maintenance[view.maintenance["branch"] == b.name] \
        if not view.maintenance.empty else view.maintenance
    m_marks = [(local(r["time"]), str(r["kind"]).replace("_", " "))
               for r in maint.to_dict(orient="records")] if not maint.empty else []
    fc = view.forecasts().get(b.name)
    late = fc is not None and view.forecast_after(fc)
    fan, note = _fan(None if late else fc, part, local)
    if fan is not None:
        end = max(end, min(local(view.end) + pd.DateOffset(months=6),
                           fan[0] + pd.Timedelta(days=_fan_days(fan, b.cleaning_limit))))
    quiet = not marks and not m_marks and fan is None
    fig = plot_branch_history(BranchHistory(
        height_in=2.0 if quiet else 3.1,
        name=f"{b.name} — {b.description}", fits=frame, cleaning_limit=b.cleaning_limit,
        start=start, end=end, month=(local(view.start), local(view.end)),
        findings=marks, maintenance=m_marks, forecast=fan))
    text = [_fit_gaps(view, b)]
    if fc is not None and late:
        made = forecast_made(fc)
        text.append("<p class=forecast><b>Forecast:</b> none as of this month. The store "
                    "keeps only the latest forecast, made on "
                    f"{_local(site, made)[:10]}, after this month; the monthly report "
                    "written on the 1st of the next month carries the forecast of its "
                    "time.</p>")
    elif fc is not None:
        text.append(_forecast(site, fc) + (f"<p class=ev>{_e(note)}</p>" if note else ""))
    month_f = open_at(mine, view.end) if not mine.empty else mine
    closed = view.in_month(mine[mine["end"].notna()], "end") if not mine.empty else mine
    shown = pd.concat([month_f, closed]) if not closed.empty else month_f
    for r in shown.to_dict(orient="records") if not shown.empty else []:
        e = r.get("end")
        state = "open at month end" if e is None or pd.isna(e) or \
            pd.Timestamp(e) >= view.end else f"ended {_local(site, e)}"
        text.append(f"<p><span class=kind>{_e(_KIND_TEXT.get(str(r['kind']), r['kind']))}"
                    f"</span>{_e(r['message'])} <span class=ev>(since "
                    f"{_local(site, r['start'])}, {_e(state)}, confidence "
                    f"{float(r['confidence']):.0%})</span></p>")
    if len(text) == 1:
        text.append("<p class=ev>No finding on this branch this month.</p>")
    return (f"<h2>{_e(b.name)}</h2>"
            f"<img alt='resistance ratio of {_e(b.name)} per day' src='"
            f"{png_data_uri(fig)}'>" + "".join(text))


def _fan(fc: dict[str, Any] | None, part: pd.DataFrame, local: Any
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


def _fit_gaps(view: MonthView, b: BranchConfig) -> str:
    """'22 of 31 days without a usable fit (too few samples 22).' or ''."""
    f = view.fits
    part = view.in_month(f[f["branch"] == b.name], "window_start") if not f.empty else f
    usable = int(part["r"].notna().sum()) if not part.empty else 0
    days = view.days_in_month()
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


def _fan_days(fan: tuple[pd.Timestamp, float, float, float, float], limit: float) -> float:
    _, r0, slope, _, _ = fan
    return max((limit - r0) / slope, 0.0) + 10.0
