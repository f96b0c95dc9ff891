"""Tests of `monitor.analysis.cost`: the SI figures of what added resistance costs, and that the
reports show the same figures as before the cost had a module of its own."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest

from monitor.analysis.cost import J_PER_KWH, energy_cost, finding_cost, price_per_joule


def test_finding_cost() -> None:
    # ΔP_extra·Q/η: 0.4 bar extra at 0.034 m³/s through a 0.70-efficient pump
    # = 40 000·0.034/0.7 = 1942.9 W → 167.9 MJ/d = 46.63 kWh/d (hand calculation,
    # P = ΔP·Q/η; 1 kWh = 3.6 MJ, SI Brochure table 8).
    c = finding_cost(flow_clean_m3s=0.040, flow_now_m3s=0.034, dp_dynamic_clean_pa=1.0e5,
                     r_now=1.4)  # fmt: skip
    assert c.extra_power_w == pytest.approx(40_000 * 0.034 / 0.7)
    assert c.extra_energy_j_per_day == pytest.approx(40_000 * 0.034 / 0.7 * 86_400)
    assert c.extra_energy_j_per_day / J_PER_KWH == pytest.approx(46.63, abs=0.005)
    assert c.lost_flow_m3s == pytest.approx(0.006)
    assert c.lost_flow_fraction == pytest.approx(0.15)
    assert c.efficiency_assumed and c.notes
    site = finding_cost(flow_clean_m3s=0.04, flow_now_m3s=0.04, dp_dynamic_clean_pa=1.0e5,
                        r_now=1.0, pump_efficiency=0.8)  # fmt: skip
    assert site.extra_power_w == 0 and not site.efficiency_assumed
    with pytest.raises(ValueError, match="pump_efficiency"):
        finding_cost(flow_clean_m3s=0.04, flow_now_m3s=0.04, dp_dynamic_clean_pa=1.0e5,
                     r_now=1.2, pump_efficiency=1.5)  # fmt: skip


def test_energy_is_priced_per_joule() -> None:
    from monitor.site.analysis_sections import EnergyPrice
    from monitor.site.config import load_site

    site = load_site(Path(__file__).parents[2] / "config" / "example-site.toml")
    priced = dataclasses.replace(site, energy_price=EnergyPrice(0.18, "EUR"))
    # 0.18 EUR/kWh is 0.18 EUR per 3.6 MJ: 5e-8 EUR/J; 10 kWh cost 1.80 EUR
    assert price_per_joule(priced) == pytest.approx(5e-8)
    assert energy_cost(priced, 10 * J_PER_KWH) == pytest.approx(1.80)
    assert energy_cost(dataclasses.replace(site, energy_price=None), 1e9) is None


# ---------------------------------------------------------------------------------------
# the same figures as before: the cost figures below were printed by the code before the
# cost had a module of its own (commit 89770c1, monitor.app.monthly and monitor.app.jobs) for the
# invented store of tests/monitor/test_monthly.py; the morning report shows the
# evidence a costed finding carries, the monthly report its tables.

#: (branch, mean lost flow [m³/h], extra pumping [kWh], cost) of August 2026
BRANCH_TABLE_BEFORE = [
    ("B1-reactor", "18.6", "2,041", "286 EUR"), ("B2-compressor", "1.7", "204", "28 EUR"),
    ("B3-quench", "0.0", "0", "0 EUR"), ("B4-process", "0.0", "0", "0 EUR"),
    ("B5-spray", "0.0", "0", "0 EUR"), ("B6-chiller", "0.0", "0", "0 EUR"),
    ("all", "20.3", "2,244", "314 EUR"),
]
#: (month, extra pumping [kWh], cost, lost flow [m³/h, sum of branch means])
MONTH_TABLE_BEFORE = [
    ("2026-08", "2,244", "314 EUR", "20.3"), ("2026-07", "2,872", "402 EUR", "24.9"),
    ("2026-06", "1,627", "228 EUR", "14.5"), ("2026-05", "1,300", "182 EUR", "10.9"),
    ("2026-04", "956", "134 EUR", "8.0"), ("2026-03", "632", "88 EUR", "5.0"),
    ("2026-02", "217", "30 EUR", "1.8"), ("2026-01", "1", "0 EUR", "0.0"),
    ("2025-12", "0", "0 EUR", "0.0"), ("2025-11", "0", "0 EUR", "0.0"),
    ("2025-10", "0", "0 EUR", "0.0"), ("2025-09", "0", "0 EUR", "0.0"),
]
#: the evidence of B1-reactor's fouling finding, costed at its newest fit
EVIDENCE_BEFORE = {"lost_flow_m3h": 22.303637907, "lost_flow_fraction": 0.151631365236,
                   "extra_dp_bar": 0.654934043825, "extra_energy_kwh_per_day": 75.6737184341}


def test_monthly_and_morning_figures_are_those_of_before(tmp_path: Path) -> None:
    import pandas as pd

    from monitor.analysis.findings import Finding
    from monitor.app.monthly_page import MonthlyInputs, build_monthly
    from monitor.app.site_diagnosis import _with_cost
    from tests.monitor import test_monthly as tm

    site = tm.make_site(tmp_path / "site")
    fits, findings = pd.DataFrame(tm.fit_rows(site)), pd.DataFrame(tm.finding_rows())
    no_maintenance = pd.DataFrame(columns=["id", "branch", "kind", "time", "note"])
    page = tm._Page()
    page.feed(build_monthly(MonthlyInputs(site, tm.MONTH, fits, findings, no_maintenance,
                                          tm.GENERATED)))
    assert [(r[0].split(" ")[0], *r[-3:]) for r in page.table("branch")[1:]
            ] == BRANCH_TABLE_BEFORE
    assert [tuple(r[:4]) for r in page.table("month")[1:]] == MONTH_TABLE_BEFORE
    f = tm.finding_rows()[0]
    costed = _with_cost(site, fits, Finding(
        branch=f["branch"], kind=f["kind"], start=f["start"], detected=f["detected"],
        end=None, confidence=f["confidence"], evidence=f["evidence"], message=f["message"]))
    for key, before in EVIDENCE_BEFORE.items():
        assert costed.evidence[key] == pytest.approx(before, rel=1e-10), key
