"""The site's diagnosis job: the stored history of fits diagnosed (`monitor.analysis.diagnose`),
its resistance findings costed (`monitor.analysis.cost`), the back-flow hazard judged on the
readings, the findings stored; and the diagnosis settings from the site file.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import replace
from datetime import datetime
from typing import Any

import pandas as pd

from adapters.base import ReadingsSource, ResultsStore
from monitor.analysis.backflow import hazard_branches, hazard_samples, settings_for
from monitor.analysis.cost import J_PER_KWH, RESISTANCE_KINDS, branch_cost
from monitor.analysis.diagnose import BranchSettings, DiagnosisSettings, Finding, diagnose
from monitor.app.ingest import read_tags
from monitor.app.windows import current_fits
from monitor.site.config import Site

log = logging.getLogger(__name__)

__all__ = [
    "diagnose_site",
    "diagnosis_settings",
    "diagnosis_time",
]


def diagnosis_settings(site: Site) -> DiagnosisSettings:
    """Diagnosis thresholds with the site's per-branch limits, their spans from
    ``[diagnosis]`` converted to windows of ``[analysis] window``; messages state flows
    in each flow tag's own unit, pressures in the branch's end-pressure tag's (else the
    header pressure tag's)."""
    def unit(tag: str | None) -> str:
        return site.tag_unit(tag, "m3/h")

    spans = site.diagnosis
    return DiagnosisSettings.for_window(
        site.window.total_seconds(), baseline_s=spans.baseline, level_s=spans.level,
        trend_min_s=spans.trend_shortest, trend_max_s=spans.trend_longest,
        branches={
            b.name: BranchSettings(
                cleaning_limit_r=b.cleaning_limit,
                min_flow_m3s=b.min_flow_m3s if b.min_flow_m3s > 0 else None,
                flow_unit=unit(b.flow_tag),
                pressure_unit=site.pressure_unit(b.name),
            )
            for b in site.branches
        },
        timezone=site.timezone,
        clear_after_s=float(site.analysis.clear_after),
        balance_flow_unit=unit(site.total_flow_tag),
    )


def diagnosis_time(store: ResultsStore, end: datetime) -> datetime:
    """The time the diagnosis after an analysis up to *end* runs to: *end*, or the end of
    the newest analysed window where one later than *end* is stored. Analysing a past
    period again (a late file, a correction) must not wind the stored findings back to
    that period's end: they stay the diagnosis of the whole analysed history."""
    newest = store.newest_fit_end()
    return end if newest is None else max(end, newest)


def diagnose_site(
    site: Site, store: ResultsStore, *, now: datetime, source: ReadingsSource | None = None,
    since: datetime | None = None,
) -> list[Finding]:
    """Diagnose the stored history up to *now*, cost the findings, store them.

    The back-flow hazard findings read the readings themselves (from *source* when it
    keeps them, else from the store): over the whole history, or — with *since*, the
    start of the period just analysed — from the earliest of *since*, the start of an
    open back-flow finding and one finding-clear time (`BackflowFindingSettings`) before
    *now*: a daily run then reads days, not the years behind it, and an open finding
    keeps its start."""
    history = current_fits(site, store.read_fits(end=now))
    if history.empty:
        return []
    findings = diagnose(
        history,
        maintenance=store.maintenance(),
        settings=diagnosis_settings(site),
        now=now,
        screening=store.read_screening(end=now),
        balance=store.read_balance(end=now),
        backflow=_backflow_inputs(site, store, source, history, now, since),
    )
    findings = [_with_cost(site, history, f) for f in findings]
    rows = [_finding_row(f) for f in findings]
    store.upsert_findings(rows + _superseded(store, findings, now))
    return findings


def _superseded(store: ResultsStore, findings: Sequence[Finding], now: datetime
                ) -> list[dict[str, Any]]:  # fmt: skip
    """Stored open findings the diagnosis of the whole history no longer makes (a store
    written before one condition became one finding holds a row per day of it): closed
    at *now*, marked ``superseded`` in their evidence, so no condition keeps two open
    rows. The diagnosis replays the whole history each run, so a finding it still makes
    has the same (branch, kind, start) and is updated in place instead; one first
    reported after *now* is left alone."""
    def key(branch: Any, kind: Any, start: Any) -> tuple[str, str, pd.Timestamp]:
        t = pd.Timestamp(start)
        return str(branch), str(kind), t.tz_localize("UTC") if t.tzinfo is None else t

    made = {key(f.branch, f.kind, f.start) for f in findings}
    out = []
    day = f"{pd.Timestamp(now):%Y-%m-%d}"
    for r in store.read_findings(open_only=True).to_dict(orient="records"):
        if key(r["branch"], r["kind"], r["start"]) in made or key(
            "", "", r["detected"])[2] > pd.Timestamp(now):
            continue  # still made, or first reported after *now* (a diagnosis of the past)
        out.append({
            **{k: r[k] for k in ("branch", "kind", "start", "detected", "confidence")},
            "end": now, "evidence": {**dict(r.get("evidence") or {}), "superseded": 1.0},
            "message": f"{r['message']} (Not found again by the diagnosis of {day} over the "
                       "whole stored history: closed.)",
        })
        log.info("finding %s %s from %s superseded", r["branch"], r["kind"], r["start"])
    return out


def _backflow_inputs(
    site: Site, store: ResultsStore, source: ReadingsSource | None, history: pd.DataFrame,
    now: datetime, since: datetime | None,
) -> tuple[pd.DataFrame, Any] | None:
    """The hazard samples over the analysed history, for the ``backflow_hazard`` findings
    (None when no branch can run back: every branch has a check valve or ends open)."""
    branches = hazard_branches(site)
    if not branches:
        return None
    start = pd.Timestamp(history["window_start"].min()).to_pydatetime()
    settings = settings_for(site, branches)
    if since is not None:
        stored = store.read_findings()
        opened = [pd.Timestamp(t).to_pydatetime() for t in stored["start"][
            (stored["kind"] == "backflow_hazard") & stored["end"].isna()]] if not stored.empty \
            else []
        start = max(start, min([since, now - settings.clear_after - site.window, *opened]))
    tags = {site.header_pressure_tag, site.header_temperature_tag, site.total_flow_tag,
            site.pump_speed_tag}
    for b in branches:
        tags |= {b.level_tag, b.end_pressure_tag}
    wanted = sorted(t for t in tags if t is not None)
    readings = (read_tags(site, store, source, wanted, start, now) if source is not None
                else store.read_readings(wanted, start, now))
    return hazard_samples(site, readings), settings


def _finding_row(f: Finding) -> dict[str, Any]:
    return {
        "branch": f.branch, "kind": f.kind, "start": f.start, "detected": f.detected,
        "end": f.end, "confidence": f.confidence, "evidence": dict(f.evidence),
        "message": f.message,
    }


def _with_cost(site: Site, history: pd.DataFrame, f: Finding) -> Finding:
    """Add lost flow and extra pump energy (`monitor.analysis.cost`, at the newest fit) to a
    resistance finding's evidence, in the units the evidence is stored in."""
    if f.kind not in RESISTANCE_KINDS:
        return f
    try:
        branch = site.branch(f.branch)
    except KeyError:
        return f
    rows = history[(history["branch"] == f.branch) & history["r"].notna()]
    if rows.empty:
        return f
    last = rows.iloc[-1]
    p_s = float(last.get("header_pressure_pa", math.nan))
    q_now = float(last.get("mean_flow_m3s", math.nan))
    r_now = float(last["r"])
    t_c = float(last.get("temperature_c", site.design_temperature_c))
    if not all(math.isfinite(v) for v in (p_s, q_now, r_now, t_c)):
        return f
    end_p = last.get("end_pressure_pa")
    r_base = float(f.evidence.get("r_baseline", 1.0))
    if not math.isfinite(r_base) or r_base <= 0:
        r_base = 1.0
    c = branch_cost(site, branch, header_pressure_pa=p_s, flow_m3s=q_now, r_now=r_now,
                    temperature_c=t_c, r_baseline=r_base,
                    end_pressure_pa=float(end_p) if end_p is not None
                    and math.isfinite(float(end_p)) else None)
    evidence = {
        **f.evidence,
        "lost_flow_m3h": c.lost_flow_m3s * 3600.0,
        "lost_flow_fraction": c.lost_flow_fraction,
        "extra_dp_bar": c.extra_dp_pa / 1e5,
        "extra_energy_kwh_per_day": c.extra_energy_j_per_day / J_PER_KWH,
    }
    return replace(f, evidence=evidence)
