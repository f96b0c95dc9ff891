"""The monthly report: the long view of every branch, and what the month's faults cost.

One self-contained HTML page per site-local calendar month, for the engineer and for the
manager they forward it to (`monitor.app.monthly_page`, with one section per branch from
`monitor.app.monthly_branch`; the month and its figures are `monitor.app.monthly_view`). The
month's daily fits go beside the page as CSV (`month_fits_csv`), in site time and plant
units. This module writes both files and finds the latest report written.

What a day costs (`monitor.app.monthly_view.daily_costs`): on each day a resistance finding
(fouling or a restriction) stood open on a branch, the day's fit gives the branch's header
pressure, flow, temperature and r; the flow the branch would carry at the finding's
baseline r at that header pressure, less the flow it carried, is the lost flow, and the
extra pressure drop (r − r_baseline)·ΔP_dyn,clean(Q) at that flow, pumped for 24 h at the
site's pump efficiency, the extra energy (`monitor.analysis.cost`, the figures the morning report's
findings carry; it computes in SI, the page shows kWh and m³/h). Days without a usable fit
are not counted, and the page says how many days were.

`build_monthly` is pure: it takes frames read from the store and the time the page is
generated, and returns HTML text; `write_monthly` reads the store and writes the files;
`month_fits` says whether the store holds fits of a month before one is asked for.
"""

from __future__ import annotations

import logging
import re
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd

from adapters.base import ResultsStore
from monitor.app.monthly_page import MonthlyInputs, build_monthly
from monitor.app.monthly_view import daily_costs, history_start, month_bounds, parse_month
from monitor.site.config import Site

log = logging.getLogger(__name__)

__all__ = [
    "MonthFits",
    "latest_monthly",
    "month_fits",
    "month_fits_csv",
    "monthly_name",
    "write_monthly",
]


def monthly_name(month: str) -> str:
    """File name of the monthly report of *month* (the CSV: ``…-fits.csv``)."""
    return f"monthly-{parse_month(month)}.html"


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
    from monitor.app.windows import current_fits

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


@dataclass(frozen=True)
class MonthFits:
    """Whether the store holds fits of *month*; when it holds none, ``stored_until`` is
    the end of the newest analysed window of any month (None: no fit stored at all)."""

    month: str
    held: bool
    stored_until: datetime | None


def month_fits(site: Site, store: ResultsStore, month: str) -> MonthFits:
    """What the store holds for the monthly report of *month* (``YYYY-MM``; a
    `ValueError` otherwise): a report of a month without fits says nothing."""
    month = parse_month(month)
    start, end = month_bounds(site, month)
    if not store.read_fits(start=start, end=end).empty:
        return MonthFits(month, True, None)
    marks = store.watermarks().fits
    until = None if marks.empty else pd.Timestamp(marks["last_window_end"].max())
    return MonthFits(month, False, until)


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
