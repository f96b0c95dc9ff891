"""The morning report: one self-contained HTML page an engineer reads first thing.

Order of the page: what needs attention (open findings, most urgent first, each with its
evidence, cost and forecast), standing alarms, every branch at a glance (today's
resistance ratio against its cleaning limit), the maintenance log, the resistance trends
as a picture, data health (what screening and the quarantine held back), and the
cautions. Plots are embedded as PNG, so the file can be mailed or archived alone.

Open findings are ordered by `attention_order`: a branch short of water first, then a
raised resistance at or past the branch's cleaning limit (fouling or a restriction),
then the lesser sudden changes (a restriction below the limit, a back-pressure change),
then the rest; within each, the costliest first (extra pumping kWh/day, then lost flow,
from the finding's evidence), then the most certain.

`build_report` is pure: it takes frames read from the store and returns HTML text.
"""

from __future__ import annotations

import html
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import pandas as pd

from adapters.records import AlarmStateName as State
from adapters.units import from_si, pressure_labels
from monitor.analysis.findings import episode_text, flow_pair
from monitor.analysis.replay_text import pressure_digits
from monitor.app.plots import png_data_uri
from monitor.site.config import Site

__all__ = [
    "ReportInputs",
    "attention_order",
    "build_report",
    "escape",
    "evidence_number",
    "forecast_html",
    "local_time",
    "page_head",
]

#: Which findings come first when neither is past its cleaning limit: a sudden change
#: before a slow one.
_URGENCY = {"low_flow": 0, "restriction": 1, "back_pressure": 2, "instrument": 3,
            "imbalance": 4, "fouling": 5}
#: How far back the maintenance log of the report reaches [d].
MAINTENANCE_DAYS = 90
_KIND_TEXT = {"low_flow": "low flow", "restriction": "restriction",
              "back_pressure": "back-pressure change", "instrument": "instrument fault",
              "imbalance": "header imbalance", "fouling": "fouling"}
#: A back-flow hazard is about the supply's safety: before everything else.
_URGENCY["backflow_hazard"] = -1
_KIND_TEXT["backflow_hazard"] = "back-flow hazard"

CAUTION = (
    "branchwatch advises; it does not control. Its findings are estimates from logged data "
    "with the confidence stated, and its alarms do not replace the plant's safety systems, "
    "interlocks or operator rounds. Decisions on isolation, cleaning, valve and set-point "
    "changes follow site procedures, local codes and the judgement of qualified, licensed "
    "people."
)


def _caution(inputs: ReportInputs) -> str:
    """The standing caution, after a named back-flow hazard when there is one: each branch
    with an open ``backflow_hazard`` finding or an active back-flow alarm, with its worst
    margin (DESIGN §6: back-flow from a tank or pressurised header can contaminate the
    supply)."""
    site = inputs.site
    unit = site.tags[site.header_pressure_tag].unit if site.header_pressure_tag in site.tags \
        else "bar"
    named: dict[str, str] = {}
    f = inputs.findings
    if not f.empty and "kind" in f.columns:
        open_ = f[(f["kind"] == "backflow_hazard") & f["end"].isna()]
        for r in open_.to_dict(orient="records"):
            ev = r.get("evidence") or {}
            worst = ev.get("worst_margin_bar")
            share = ev.get("share_of_time")
            text = f"{r['branch']}"
            if worst is not None and math.isfinite(float(worst)):
                below = abs(float(from_si(float(worst) * 1e5, unit, "pressure"))
                            - float(from_si(0.0, unit, "pressure")))
                text += f" (header below its static back-pressure by up to {below:.2f} {unit}"
                if share is not None and math.isfinite(float(share)):
                    text += f", {float(share):.0%} of the time"
                text += ")"
            named[str(r["branch"])] = text
    a = inputs.alarms
    if not a.empty and "condition" in a.columns:
        live = a[(a["condition"] == "backflow") & a["active"].fillna(False).astype(bool)]
        for r in live.to_dict(orient="records"):
            named.setdefault(str(r["branch"]), f"{r['branch']} (back-flow alarm active now)")
    standing = f"<p class=caution>{escape(CAUTION)}</p>"
    if not named:
        return standing
    return (
        f"<p class=caution><strong>Back-flow hazard:</strong> "
        f"{escape('; '.join(named[k] for k in sorted(named)))}. With no check valve on these "
        "branches, water can run back from their tank or header into the supply and "
        "contaminate it. Have a qualified person check the branch and the header pressure "
        "set point against site procedures.</p>\n" + standing
    )


@dataclass(frozen=True)
class ReportInputs:
    """What the report is built from (frames as the results store returns them)."""

    site: Site
    day: datetime  # the report covers data up to the end of this local day (UTC-aware)
    fits: pd.DataFrame
    findings: pd.DataFrame
    alarms: pd.DataFrame
    quarantine: dict[str, int]
    health: pd.DataFrame
    generated: datetime
    #: time of the newest stored reading of any tag (None: none stored) and the age past
    #: which data counts as stale [s], for the header's data age
    newest_reading: datetime | None = None
    stale_after_s: float | None = None
    #: maintenance entries (the store's ``maintenance(include_withdrawn=True)``)
    maintenance: pd.DataFrame = field(default_factory=pd.DataFrame)
    #: the latest monthly report: (file name beside this report, its month "YYYY-MM")
    monthly: tuple[str, str] | None = None
    #: the time the data's age is told at: the report's scheduled time after its day, or
    #: when it was generated if that is earlier (None: *generated*)
    as_of: datetime | None = None
    #: messages the outbox gave up on lately (the store's ``outbox(status="failed")``)
    failed_messages: pd.DataFrame = field(default_factory=pd.DataFrame)


def build_report(inputs: ReportInputs) -> str:
    """The HTML text of the morning report."""
    site = inputs.site
    local_day = pd.Timestamp(inputs.day).tz_convert(site.timezone)
    parts = [
        _head(f"{site.name} — {local_day:%Y-%m-%d}"),
        f"<h1>{escape(site.name)}</h1>",
        f"<p class=sub>Morning report for {local_day:%A %d %B %Y} (site time "
        f"{escape(site.timezone)}). Generated {local_time(site, inputs.generated)}.</p>",
        _data_age(inputs),
        _monthly_link(inputs),
        _caution(inputs),
        _attention(inputs),
        _alarms(inputs),
        _branches(inputs),
        _maintenance(inputs),
        _trends(inputs),
        _health(inputs),
        _method(),
        "</body></html>",
    ]
    return "\n".join(p for p in parts if p)


def _data_age(inputs: ReportInputs) -> str:
    """'Data up to 2026-06-10 05:50, 3 h 10 min old' (site time), flagged when stale."""
    from monitor.app.alarms import format_age

    newest = inputs.newest_reading
    if newest is None:
        return ("<p class=stale>No readings stored yet: nothing below comes from the plant's "
                "data. Check the historian export or database link.</p>")
    as_of = pd.Timestamp(inputs.as_of or inputs.generated)
    newest = min(pd.Timestamp(newest), as_of)  # a past day's report: the data then
    age = (as_of - newest).total_seconds()
    text = (f"Data up to {local_time(inputs.site, newest)}, {format_age(age)} old at "
            f"{local_time(inputs.site, as_of)}, the time of this report.")
    if inputs.stale_after_s is not None and age > inputs.stale_after_s:
        return (f"<p class=stale>STALE DATA: {escape(text)} No new readings for more than "
                f"{escape(format_age(inputs.stale_after_s))}: the resistance ratios and findings "
                "below describe the plant as it was then, not today. Check the historian "
                "export or database link.</p>")
    return f"<p class=sub>{escape(text)}</p>"


def _monthly_link(inputs: ReportInputs) -> str:
    if inputs.monthly is None:
        return ""
    name, month = inputs.monthly
    label = f"{pd.Timestamp(month + '-01'):%B %Y}"
    return (f"<p class=sub>The long view: <a href='{escape(name)}'>monthly report for "
            f"{escape(label)}</a> (resistance over two years, energy and its cost by month).</p>")


def escape(text: Any) -> str:
    """*text* as HTML text (``&``, ``<``, ``>`` and quotes escaped)."""
    return html.escape(str(text))


def local_time(site: Site, when: Any) -> str:
    """A UTC time as the site's local date and time ('2026-06-10 11:30'); '—' for none."""
    if when is None or (isinstance(when, float) and math.isnan(when)) or pd.isna(when):
        return "—"
    return f"{pd.Timestamp(when).tz_convert(site.timezone):%Y-%m-%d %H:%M}"


def _head(title: str, extra_css: str = "") -> str:
    return f"""<!doctype html><html lang=en><head><meta charset=utf-8>
<title>{escape(title)}</title>
<style>
body {{ font: 15px/1.45 system-ui, sans-serif; margin: 2em auto; max-width: 62em;
        color: #1d2433; padding: 0 1em; }}
h1 {{ font-size: 1.5em; margin-bottom: .1em; }} h2 {{ font-size: 1.15em; margin-top: 1.8em;
        border-bottom: 1px solid #c9cfdb; }}
.sub {{ color: #555e70; margin-top: 0; }}
.caution {{ background: #fff6e0; border-left: 4px solid #d39b00; padding: .6em .9em; }}
.stale {{ background: #fde8e6; border-left: 4px solid #b3261e; padding: .6em .9em;
          font-weight: 600; }}
table {{ border-collapse: collapse; width: 100%; font-size: .93em; }}
th, td {{ text-align: left; padding: .3em .5em; border-bottom: 1px solid #e3e6ed; }}
th {{ background: #f1f3f7; }}
td.num, th.num {{ text-align: right; font-variant-numeric: tabular-nums; }}
.finding {{ border: 1px solid #d5dae4; border-radius: 6px; padding: .6em .9em; margin: .7em 0; }}
.finding h3 {{ margin: 0 0 .3em 0; font-size: 1em; }}
.kind {{ display: inline-block; padding: 0 .5em; border-radius: 3px; background: #e8ecf4;
        font-size: .85em; margin-right: .4em; }}
.urgent {{ border-left: 5px solid #b3261e; }} .watch {{ border-left: 5px solid #d39b00; }}
.info {{ border-left: 5px solid #6b7a99; }}
.ev {{ color: #444c5e; font-size: .9em; }}
.over {{ color: #b3261e; font-weight: 600; }}
img {{ max-width: 100%; }}
{extra_css}</style></head><body>"""


def page_head(title: str, extra_css: str = "") -> str:
    """The start of a report page (doctype, title, the reports' style sheet, ``<body>``),
    for other pages in the same look (the monthly report, the fleet summary)."""
    return _head(title, extra_css)


def evidence_number(ev: Mapping[str, Any], key: str) -> float | None:
    """The finite number *key* of a finding's evidence; None when absent or not finite."""
    v = ev.get(key)
    return float(v) if isinstance(v, int | float) and math.isfinite(float(v)) else None


def _limit(site: Site, row: Mapping[Any, Any]) -> float | None:
    """The cleaning limit of the finding's branch: the site file's, else the evidence's."""
    try:
        return float(site.branch(str(row["branch"])).cleaning_limit)
    except KeyError:
        return evidence_number(row.get("evidence") or {}, "cleaning_limit_r")


def _r_level(ev: Mapping[str, Any]) -> float | None:
    """The raised resistance ratio a finding stands at (recent level, or after a step)."""
    for key in ("r_recent", "r_now", "r_after"):
        if (v := evidence_number(ev, key)) is not None:
            return v
    return None


def _tier(site: Site, row: Mapping[Any, Any]) -> int:
    """0: short of water; 1: r at or past the cleaning limit; 2: a lesser sudden change;
    3: the rest (fouling below the limit, instruments, header balance)."""
    kind = str(row["kind"])
    if kind == "low_flow":
        return 0
    ev = row.get("evidence") or {}
    limit, level = _limit(site, row), _r_level(ev)
    if (kind in ("fouling", "restriction") and limit is not None and level is not None
            and level >= limit):
        return 1
    return 2 if kind in ("restriction", "back_pressure") else 3


def attention_order(site: Site, findings: pd.DataFrame) -> pd.DataFrame:
    """*findings* in the order the report lists them (see the module docstring)."""
    if findings.empty:
        return findings
    recs = findings.to_dict(orient="records")

    def key(i: int) -> tuple[float, ...]:
        r = recs[i]
        ev = r.get("evidence") or {}
        kwh = evidence_number(ev, "extra_energy_kwh_per_day") or 0.0
        lost = evidence_number(ev, "lost_flow_m3h") or 0.0
        start = pd.Timestamp(r["start"]).timestamp()
        costed = 0 if kwh > 0 or lost > 0 else 1  # a cost known and counted comes first
        return (_tier(site, r), costed, -kwh, -lost, _URGENCY.get(str(r["kind"]), 9),
                -float(r["confidence"]), start)

    order = sorted(range(len(recs)), key=key)
    return findings.iloc[order]


def _attention(inputs: ReportInputs) -> str:
    site = inputs.site
    f = inputs.findings
    open_f = f[f["end"].isna()] if not f.empty else f
    if open_f.empty:
        return ("<h2>What needs attention</h2><p>Nothing: no open findings. Every branch is "
                "within its usual range.</p>")
    rows = attention_order(site, open_f)
    out = [f"<h2>What needs attention ({len(rows)})</h2>"]
    for r in rows.to_dict(orient="records"):
        kind = str(r["kind"])
        tier = _tier(site, r)
        level = "urgent" if tier <= 1 or kind == "restriction" else (
            "watch" if kind in ("back_pressure", "fouling") else "info")
        ev = r.get("evidence") or {}
        forecast = forecast_html(site, r) if kind == "fouling" else ""
        out.append(
            f"<div class='finding {level}'><h3><span class=kind>"
            f"{escape(_KIND_TEXT.get(kind, kind))}"
            f"</span>{escape(r['branch'])}</h3><p>{escape(r['message'])}</p>{forecast}"
            f"<p class=ev>since {local_time(site, r['start'])} · first reported "
            f"{local_time(site, r['detected'])} · confidence {float(r['confidence']):.0%}"
            f"{_evidence_text(site, kind, ev, branch=str(r['branch']))}</p></div>"
        )
    return "\n".join(out)


def _day(site: Site, epoch_s: float) -> str:
    return f"{pd.Timestamp(epoch_s, unit='s', tz='UTC').tz_convert(site.timezone):%Y-%m-%d}"


def forecast_html(site: Site, row: Mapping[Any, Any]) -> str:
    """The date r reaches the cleaning limit, with its interval, from the evidence."""
    ev = row.get("evidence") or {}
    limit = evidence_number(ev, "cleaning_limit_r") or _limit(site, row)
    lim = f"{limit:.2f}" if limit is not None else "its cleaning limit"
    level = _r_level(ev)
    days = evidence_number(ev, "days_to_limit")
    if (days is not None and days <= 0) or (
            level is not None and limit is not None and level >= limit):
        text = f"at or past the cleaning limit {lim} (r {level:.2f})" if level is not None \
            else f"at or past the cleaning limit {lim}"
        return f"<p class=forecast><b>Forecast:</b> {escape(text)}.</p>"
    when = evidence_number(ev, "limit_date_s")
    if when is None:
        return (f"<p class=forecast><b>Forecast:</b> the rate is too uncertain to say when "
                f"r reaches the cleaning limit {escape(lim)}.</p>")
    lo, hi = evidence_number(ev, "limit_date_low_s"), evidence_number(ev, "limit_date_high_s")
    span = (f" (between {_day(site, lo) if lo is not None else 'now'} and "
            f"{_day(site, hi) if hi is not None else 'later'})")
    return (f"<p class=forecast><b>Forecast:</b> r reaches the cleaning limit {escape(lim)} "
            f"about <b>{_day(site, when)}</b>{escape(span)}.</p>")


def _flow_unit(site: Site, kind: str, branch: str) -> str:
    """The unit a finding's flows are stated in: its branch's flow tag's, or for a
    header imbalance the total flow tag's (m3/h when neither is known)."""
    tag = site.total_flow_tag if kind == "imbalance" else next(
        (b.flow_tag for b in site.branches if b.name == branch), None)
    return site.tag_unit(tag, "m3/h")


def _evidence_text(site: Site, kind: str, ev: dict[str, Any], *, branch: str = "") -> str:
    bits = []
    unit = _flow_unit(site, kind, branch)
    if (q := evidence_number(ev, "lost_flow_m3h")) is not None:
        (lost,), _ = flow_pair([q / 3600.0], 0.0, unit)
        bits.append(f"flow lost {lost} {unit}")
    if (e := evidence_number(ev, "extra_energy_kwh_per_day")) is not None:
        bits.append(f"extra pumping {e:.0f} kWh/day")
    if kind == "fouling" and (s := evidence_number(ev, "slope_per_day")) is not None:
        bits.append(f"r rising {s * 30:.3f} per month")
    if kind == "back_pressure" and (s := evidence_number(ev, "step_pa")) is not None:
        plain = pressure_labels(site.pressure_unit(branch))[1]
        step = float(from_si(s, plain, "pressure"))
        bits.append(f"step {step:+.{pressure_digits(plain)}f} {plain}")
    if ev.get("priority") == 3.0:  # `monitor.analysis.findings.PRIORITIES`
        bits.append("priority high")
    if episodes := episode_text(ev, timezone=site.timezone, flow_unit=unit):
        bits.append(episodes)
    return (" · " + " · ".join(escape(b) for b in bits)) if bits else ""


def _undelivered(inputs: ReportInputs) -> str:
    """The messages that could not be sent (the outbox gave up on them)."""
    failed = inputs.failed_messages
    if failed.empty:
        return ""
    items = "".join(
        f"<li>{escape(r['channel'])}: {escape(r['subject'])} — "
        f"{escape(r.get('last_error') or '')}</li>"
        for r in failed.to_dict(orient="records"))
    return (f"<p class=stale>{len(failed)} message(s) could not be sent and were given up "
            "(check the [notify] settings; 'branchwatch notify CONFIG --test' tries them):"
            f"</p><ul>{items}</ul>")


def _alarms(inputs: ReportInputs) -> str:
    a = inputs.alarms
    standing = a[a["state"] != State.NORMAL.value] if not a.empty else a
    if standing.empty:
        return ("<h2>Alarms</h2><p>No alarm standing (low flow, frozen meter, stale data"
                ").</p>" + _undelivered(inputs))
    rows = "".join(
        f"<tr><td>{escape(r['branch'])}</td><td>{escape(r['state'])}</td>"
        f"<td>{local_time(inputs.site, r.get('activated'))}</td>"
        f"<td>{escape(r.get('message') or '')}"
        "</td></tr>"
        for r in standing.to_dict(orient="records")
    )
    return ("<h2>Alarms</h2><table><tr><th>branch</th><th>state (ISA-18.2)</th>"
            f"<th>since</th><th>message</th></tr>{rows}</table>" + _undelivered(inputs))


def _branches(inputs: ReportInputs) -> str:
    site, fits = inputs.site, inputs.fits
    rows = []
    for b in site.branches:
        part = fits[(fits["branch"] == b.name) & fits["r"].notna()] if not fits.empty else fits
        if part.empty:
            rows.append(f"<tr><td>{escape(b.name)}</td><td colspan=6>no usable fit yet</td></tr>")
            continue
        last = part.iloc[-1]
        week = part[part["window_end"] <= last["window_end"] - pd.Timedelta(days=7)]
        change = (f"{float(last['r']) - float(week.iloc[-1]['r']):+.3f}"
                  if not week.empty else "—")
        r = float(last["r"])
        cls = " class='num over'" if r >= b.cleaning_limit else " class=num"
        flow = float(last.get("mean_flow_m3s", math.nan)) * 3600
        low = "" if not math.isfinite(flow) or flow >= b.min_flow_m3s * 3600 else " class=over"
        rows.append(
            f"<tr><td>{escape(b.name)}<br><span class=ev>{escape(b.description)}</span></td>"
            f"<td{cls}>{r:.3f}</td><td class=num>{float(last['r_low']):.3f}–"
            f"{float(last['r_high']):.3f}</td><td class=num>{change}</td>"
            f"<td class=num>{b.cleaning_limit:.2f}</td>"
            f"<td class=num><span{low}>{flow:.1f}</span> / {b.min_flow_m3s * 3600:.0f}</td>"
            f"<td>{local_time(site, last['window_end'])}</td></tr>"
        )
    return ("<h2>Branches</h2><table><tr><th>branch</th><th class=num>resistance ratio r</th>"
            "<th class=num>95 % interval</th><th class=num>7-day change</th>"
            "<th class=num>cleaning limit</th><th class=num>mean flow / minimum [m³/h]</th>"
            "<th>last window ended</th></tr>"
            + "".join(rows) + "</table><p class=ev>r = 1.00 is the branch as designed and "
            "clean; 1.40 means 40 % more hydraulic resistance.</p>")


def _maintenance(inputs: ReportInputs) -> str:
    """The entries of the last `MAINTENANCE_DAYS` days up to the report day, site time;
    withdrawn entries are shown as such (the diagnosis does not read them)."""
    site, m = inputs.site, inputs.maintenance
    head = f"<h2>Maintenance log (last {MAINTENANCE_DAYS} days)</h2>"
    end = pd.Timestamp(inputs.day) + pd.Timedelta(days=1)
    if not m.empty:
        m = m[(m["time"] < end) & (m["time"] >= end - pd.Timedelta(days=MAINTENANCE_DAYS))]
    if m.empty:
        return head + "<p>No maintenance logged.</p>"
    rows = []
    for r in m.sort_values("time", ascending=False).to_dict(orient="records"):
        state = ""
        withdrawn = r.get("withdrawn_at")
        if withdrawn is not None and not pd.isna(withdrawn):
            state = (f"withdrawn {local_time(site, withdrawn)} by {r.get('withdrawn_by') or '?'}"
                     + (f": {r['withdrawn_note']}" if r.get("withdrawn_note") else ""))
        rows.append(
            f"<tr{' class=ev' if state else ''}><td class=num>{escape(r.get('id', ''))}</td>"
            f"<td>{local_time(site, r['time'])}</td><td>{escape(r['branch'])}</td>"
            f"<td>{escape(str(r['kind']).replace('_', ' '))}</td>"
            f"<td>{escape(r.get('note') or '')}</td>"
            f"<td>{escape(state)}</td></tr>"
        )
    return (head + f"<table><tr><th class=num>entry</th><th>time ({escape(site.timezone)})</th>"
            "<th>branch</th><th>work</th><th>note</th><th>withdrawn</th></tr>"
            + "".join(rows) + "</table>")


def _trends(inputs: ReportInputs) -> str:
    site, fits = inputs.site, inputs.fits
    if fits.empty or fits["r"].notna().sum() == 0:
        return ""
    n = len(site.branches)
    cols = 2
    rows_n = math.ceil(n / cols)
    fig, axes = plt.subplots(rows_n, cols, figsize=(10, 2.3 * rows_n), dpi=100, sharex=True,
                             squeeze=False)
    for ax, b in zip(axes.flat, site.branches, strict=False):
        part = fits[(fits["branch"] == b.name) & fits["r"].notna()]
        t = pd.to_datetime(part["window_end"]).dt.tz_convert(site.timezone).dt.tz_localize(None)
        ax.fill_between(t, part["r_low"], part["r_high"], color="#9fb3d9", alpha=0.5, lw=0)
        ax.plot(t, part["r"], color="#23407a", lw=1.2)
        ax.axhline(b.cleaning_limit, color="#b3261e", lw=0.9, ls="--")
        ax.axhline(1.0, color="grey", lw=0.6)
        ax.set_title(b.name, fontsize=9, loc="left")
        ax.set_ylim(0.8, max(b.cleaning_limit * 1.1, float(part["r"].max()) * 1.05))
        ax.grid(True, alpha=0.3)
        ax.tick_params(labelsize=8)
    for ax in list(axes.flat)[n:]:
        ax.set_visible(False)
    fig.suptitle("resistance ratio r per day (band: 95 % interval; dashed: cleaning limit)",
                 fontsize=9)
    fig.autofmt_xdate()
    fig.tight_layout()
    return ("<h2>Resistance trends</h2>"
            f"<img alt='resistance ratio per branch and day' src='{png_data_uri(fig)}'>")


def _health(inputs: ReportInputs) -> str:
    h, site = inputs.health, inputs.site
    parts = ["<h2>Data health</h2>"]
    if inputs.quarantine:
        items = ", ".join(f"{escape(k)}: {v}" for k, v in sorted(inputs.quarantine.items()))
        parts.append(f"<p>Rows held in quarantine (not used, kept for review): {items}.</p>")
    else:
        parts.append("<p>No rows in quarantine.</p>")
    if h.empty:
        parts.append("<p>No screening counts for the last day.</p>")
        return "\n".join(parts)
    wide = h.pivot_table(index="tag", columns="flag", values="count", aggfunc="sum",
                         fill_value=0)
    shown = [c for c in ("samples", "usable", "frozen", "spike", "out_of_range", "gap",
                         "pump_off", "bad_quality") if c in wide.columns]
    head = "".join(f"<th class=num>{escape(c.replace('_', ' '))}</th>" for c in shown)
    body = "".join(
        f"<tr><td>{escape(tag)}</td>" + "".join(f"<td class=num>{int(row[c])}</td>" for c in shown)
        + "</tr>" for tag, row in wide.iterrows()
    )
    parts.append(f"<p>Screening of the last day ({escape(site.timezone)} day), samples per tag:</p>"
                 f"<table><tr><th>tag</th>{head}</tr>{body}</table>")
    return "\n".join(parts)


def _method() -> str:
    return (
        "<h2>How these numbers are made</h2><p class=ev>Each day, the samples where the pump "
        "runs and the branch's flow and the header pressure are steady are fitted to the "
        "branch's physics model (Darcy–Weisbach with Colebrook friction, Crane fitting "
        "losses, IEC 60534 control valve, rated equipment pressure drop, water properties at "
        "the logged temperature). Fouling is a sustained rise of r (Theil–Sen slope, "
        "Mann–Kendall test with the Hamed–Rao correction); a restriction is a step; a "
        "back-pressure change moves the termination pressure and leaves r alone. A step "
        "part-way through a day is located within the day and the samples after it are "
        "fitted on their own, so it is named when that day's analysis runs and dated to its "
        "hour. Meters that freeze, keep spiking or stay out of their range are set aside and "
        "reported, never "
        "read as fouling. A branch without its own meter gets its flow from the total meter "
        "less the others. Energy figures use the pump efficiency of the site file.</p>"
    )


def report_day_bounds(site: Site, day: datetime) -> tuple[datetime, datetime]:
    """UTC start and end of the site-local calendar day containing *day*."""
    local = pd.Timestamp(day).tz_convert(site.timezone).normalize()
    end = local + pd.Timedelta(days=1)
    return local.tz_convert("UTC").to_pydatetime(), end.tz_convert("UTC").to_pydatetime()


def history_start(day: datetime, days: int = 365) -> datetime:
    """How far back the report's trends reach."""
    return day - timedelta(days=days)
