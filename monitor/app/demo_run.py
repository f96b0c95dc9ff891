"""The demo, step by step: the demo site built and its system curve drawn; after its
exports are ingested and analysed (`monitor.app.ingest`, `monitor.app.jobs`), the reports of the
period written.

``branchwatch demo`` runs these steps and prints between them; each returns a record.
The simulated site and its story are `monitor.app.demo`.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path

from adapters.base import ResultsStore
from monitor.analysis.findings import Finding
from monitor.app.demo import DEMO_START, DemoPaths, prepare_demo
from monitor.site.config import Site, load_site

__all__ = ["DemoReports", "DemoSite", "build_demo_site", "write_demo_reports"]


@dataclass(frozen=True)
class DemoSite:
    """A fresh demo folder, its site, and the period its exports cover (UTC)."""

    paths: DemoPaths
    site: Site
    start: datetime
    end: datetime


@dataclass(frozen=True)
class DemoReports:
    """The files the demo's reports were written to."""

    monthly: Path
    report: Path
    findings: Path


def build_demo_site(folder: Path, *, days: int, step_s: float) -> DemoSite:
    """A fresh demo folder with *days* of exports sampled every *step_s* [s]
    (`monitor.app.demo.prepare_demo`), its site loaded, and the system curve at the pump
    operating point drawn to ``system-curve.png`` (when the operating point solves)."""
    from monitor.analysis.whatif import CurveRequest, solve_curve
    from monitor.app.plots import plot_system_curve

    paths = prepare_demo(folder, days=days, step_s=step_s)
    site = load_site(paths.site_file)
    curve = solve_curve(site, CurveRequest())
    if curve.ok:
        plot_system_curve(site, curve, folder / "system-curve.png")
    return DemoSite(paths, site, DEMO_START, DEMO_START + timedelta(days=days))


def write_demo_reports(site: Site, store: ResultsStore, folder: Path, findings: Sequence[Finding],
                       *, end: datetime, now: datetime) -> DemoReports:
    """The monthly report of the last whole month before *end*, then the morning report
    of the period's last day that links to it, and *findings* as ``findings.json``."""
    from monitor.analysis.diagnose import findings_to_json
    from monitor.app.monthly import write_monthly
    from monitor.app.monthly_view import previous_month
    from monitor.app.morning_report import write_report

    monthly = write_monthly(site, store, month=previous_month(site, end), generated=now)
    report = write_report(site, store, day=end - timedelta(hours=12), now=now)
    findings_file = folder / "findings.json"
    findings_file.write_text(json.dumps(findings_to_json(findings), indent=2))
    return DemoReports(monthly, report, findings_file)
