"""The month of the monthly report and its figures.

The site-local calendar month (``YYYY-MM``): its UTC bounds, the month before a time, and
how far back the long view reaches. What a day costs in the page's units (`daily_costs`:
`monitor.analysis.cost` computes in SI, the page shows kWh and m³/h), and `MonthView`: the month's
view of the store's frames (fits, findings, maintenance) that the sections of the page
(`monitor.app.monthly_page`, `monitor.app.monthly_branch`) read.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from datetime import datetime
from typing import Any

import pandas as pd

from monitor.analysis import cost
from monitor.app.report import evidence_number as _num
from monitor.site.config import Site

__all__ = [
    "HISTORY_MONTHS",
    "MonthView",
    "daily_costs",
    "days_shown",
    "forecast_made",
    "history_start",
    "local_month",
    "money_text",
    "month_bounds",
    "open_at",
    "parse_month",
    "previous_month",
    "totals_shown",
]

#: How many months the long view reaches back at most (from the first fit, if later).
HISTORY_MONTHS = 24
_MONTH = re.compile(r"(\d{4})-(\d{2})")


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


def history_start(site: Site, month: str) -> datetime:
    """How far back the long view of *month* reaches: `HISTORY_MONTHS` before its end."""
    _, end = month_bounds(site, month)
    local = pd.Timestamp(end).tz_convert(site.timezone).tz_localize(None)
    back = (local - pd.DateOffset(months=HISTORY_MONTHS)).tz_localize(site.timezone)
    return back.tz_convert("UTC").to_pydatetime()


# ---------------------------------------------------------------------------------------
# costs


def daily_costs(site: Site, fits: pd.DataFrame, findings: pd.DataFrame) -> pd.DataFrame:
    """`monitor.analysis.cost.daily_costs` in the page's units: columns ``branch``,
    ``window_start``, ``window_end``, ``lost_flow_m3h`` [m³/h], ``extra_kwh`` [kWh/d],
    ``costed``."""
    return days_shown(cost.daily_costs(site, fits, findings))


def days_shown(days: pd.DataFrame) -> pd.DataFrame:
    return pd.DataFrame({
        "branch": days["branch"], "window_start": days["window_start"],
        "window_end": days["window_end"], "lost_flow_m3h": days["lost_flow_m3s"] * 3600.0,
        "extra_kwh": days["extra_energy_j"] / cost.J_PER_KWH, "costed": days["costed"],
    }, columns=["branch", "window_start", "window_end", "lost_flow_m3h", "extra_kwh",
                "costed"])


def totals_shown(totals: pd.DataFrame) -> pd.DataFrame:
    """`monitor.analysis.cost.monthly_totals` in the page's units (kWh, m³/h)."""
    return pd.DataFrame({
        "month": totals["month"], "branch": totals["branch"],
        "extra_kwh": totals["extra_energy_j"] / cost.J_PER_KWH,
        "lost_flow_m3h": totals["lost_flow_m3s"] * 3600.0, "days": totals["days"],
        "costed": totals["costed"],
    }, columns=["month", "branch", "extra_kwh", "lost_flow_m3h", "days", "costed"])


def local_month(site: Site, t: pd.Series) -> pd.Series:
    return pd.to_datetime(t).dt.tz_convert(site.timezone).dt.strftime("%Y-%m")


def money_text(site: Site, kwh: float) -> str:
    money = cost.energy_cost(site, kwh * cost.J_PER_KWH)
    if money is None or site.energy_price is None:
        return "—"
    return f"{money:,.0f} {site.energy_price.currency}"


def open_at(f: pd.DataFrame, when: pd.Timestamp) -> pd.DataFrame:
    """Findings that started before *when* and had not ended by then."""
    if f.empty:
        return f
    end = pd.to_datetime(f["end"], utc=True)
    return f[(pd.to_datetime(f["start"], utc=True) < when) & (end.isna() | (end > when))]


def forecast_made(row: Mapping[str, Any]) -> pd.Timestamp | None:
    """When a fouling finding's forecast was made (its last evaluation), from evidence."""
    ev = row.get("evidence") or {}
    when, days = _num(ev, "limit_date_s"), _num(ev, "days_to_limit")
    if when is None or days is None:
        return None
    return pd.Timestamp(when - days * 86400.0, unit="s", tz="UTC")


class MonthView:
    """The month's view of the store's frames, read by the sections of the page."""

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
        self.days = days_shown(si_days)
        self.totals = totals_shown(cost.monthly_totals(site, si_days))

    # -- helpers -------------------------------------------------------------------------
    def in_month(self, frame: pd.DataFrame, col: str) -> pd.DataFrame:
        if frame.empty:
            return frame
        t = pd.to_datetime(frame[col], utc=True)
        return frame[(t >= self.start) & (t < self.end)]

    def branch_fits(self, name: str) -> pd.DataFrame:
        f = self.fits
        return f if f.empty else f[(f["branch"] == name) & f["r"].notna()]

    def month_total(self, month: str) -> tuple[float, float, int]:
        """(extra kWh, mean lost flow summed over branches [m³/h], costed branch-days)."""
        t = self.totals[self.totals["month"] == month] if not self.totals.empty else \
            self.totals
        if t.empty:
            return 0.0, 0.0, 0
        return float(t["extra_kwh"].sum()), float(t["lost_flow_m3h"].sum()), \
            int(t["costed"].sum())

    def days_in_month(self) -> int:
        return round((self.end - self.start) / pd.Timedelta(days=1))

    def last_r(self, name: str) -> float | None:
        part = self.in_month(self.branch_fits(name), "window_start")
        return None if part.empty else float(part.iloc[-1]["r"])

    def forecast_after(self, row: Mapping[str, Any]) -> bool:
        """True when the finding's forecast was made after the month (the store keeps only
        the latest): it does not describe the month."""
        made = forecast_made(row)
        return made is not None and made > self.end + pd.Timedelta(days=2)

    def forecasts(self) -> dict[str, dict[str, Any]]:
        """The fouling finding open at month end, per branch (the newest)."""
        out: dict[str, dict[str, Any]] = {}
        f = open_at(self.findings, self.end)
        if f.empty:
            return out
        for r in f[f["kind"] == "fouling"].sort_values("start").to_dict(orient="records"):
            out[str(r["branch"])] = {str(k): v for k, v in r.items()}
        return out

    def months(self) -> list[str]:
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
