"""The site's alarm points: which near-real-time checks a site has (`alarm_checks`:
branch, condition, tag, limit), each check's settings from the site file, the age at which
data is stale, and an alarm's state as a store row and back.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from datetime import datetime, timedelta
from typing import Any

import pandas as pd

from monitor.analysis.backflow import hazard_branches, static_margin, termination_words
from monitor.analysis.sample_checks import resolution_by_tag
from monitor.app.alarm_process import BackflowAlarmSettings, FlowDropSettings, LowFlowSettings
from monitor.app.alarms import (
    AlarmState,
    State,
    priority_of,
)
from monitor.site.config import BranchConfig, Site

__all__ = [
    "SOURCE_ALARM_BRANCH",
    "SOURCE_ALARM_CONDITION",
    "alarm_checks",
    "alarm_row",
    "alarm_state_from_row",
    "backflow_settings",
    "condition_lag",
    "driving_pressure",
    "flow_drop_settings",
    "low_flow_settings",
    "stale_after",
    "tag_owners",
]


def alarm_state_from_row(row: Mapping[Any, Any]) -> AlarmState:
    """The alarm's state as stored (see `alarm_row`)."""
    def t(key: str) -> datetime | None:
        value = row.get(key)
        return None if value is None or pd.isna(value) else pd.Timestamp(value).to_pydatetime()

    value = row.get("value")
    return AlarmState(
        branch=str(row["branch"]),
        condition=str(row["condition"]),
        state=State(str(row["state"])),
        active=bool(row.get("active") or False),
        pending_since=t("pending_since"),
        clear_since=t("clear_since"),
        last_sample=t("last_sample"),
        activated_at=t("activated"),
        acknowledged_at=t("acknowledged"),
        acknowledged_by=str(row.get("acknowledged_by") or ""),
        shelved_until=t("shelved_until"),
        last_value=math.nan if value is None or pd.isna(value) else float(value),
        message=str(row.get("message") or ""),
    )


def alarm_row(state: AlarmState, *, limit_m3s: float | None, now: datetime) -> dict[str, Any]:
    """A store row for *state* (the store journals every change of ``state``)."""
    return {
        "branch": state.branch, "condition": state.condition, "state": state.state.value,
        "activated": state.activated_at, "acknowledged": state.acknowledged_at,
        "shelved_until": state.shelved_until, "value": state.last_value,
        "limit_value": limit_m3s, "message": state.message, "updated": now,
        "active": state.active, "pending_since": state.pending_since,
        "clear_since": state.clear_since, "last_sample": state.last_sample,
        "acknowledged_by": state.acknowledged_by or None,
        "priority": priority_of(state.condition),
    }


def low_flow_settings(site: Site, branch: BranchConfig) -> LowFlowSettings:
    """Low-flow alarm settings of *branch*: limit and delays from the site file; the
    deadband is 5 % of the meter range (ISA-18.2 table for flow, from memory), the range
    taken from the tag's configured high limit or else twice the minimum flow."""
    assert branch.flow_tag is not None
    high = site.tags[branch.flow_tag].high
    span = high if high is not None and high > 0 else 2.0 * branch.min_flow_m3s
    return LowFlowSettings(
        min_flow_m3s=branch.min_flow_m3s,
        range_m3s=max(span, 1e-6),
        on_delay=timedelta(seconds=site.analysis.low_flow_on_delay),
        off_delay=timedelta(seconds=site.analysis.low_flow_off_delay),
        latching=site.analysis.low_flow_latching,
        max_gap=timedelta(seconds=max(900.0, 3 * site.analysis.sample_period)),
    )


def condition_lag(site: Site) -> float:
    """How far before the first new sample the condition tags are read [s]."""
    return max(900.0, 3.0 * site.analysis.sample_period)


#: The header gauge must resolve the branch's driving pressure to this share for the
#: flow-drop alarm to follow the header (our choice: a step of 2 % of the driving pressure
#: moves the expected flow by 1 %, a fifth of the default alarm fraction).
FOLLOW_HEADER_SHARE = 0.02


def driving_pressure(site: Site, branch: BranchConfig, readings: pd.DataFrame
                     ) -> pd.Series | None:
    """The header pressure less the branch's static back-pressure [Pa] at each header
    sample where the pumps run, for the flow-drop alarm to follow the header; None when
    ``follow_header`` is off or the header gauge is too coarse for it (its resolution,
    estimated from the readings, above `FOLLOW_HEADER_SHARE` of the median driving
    pressure: a test rig's 0.05-bar gauge at 0.07 bar)."""
    if branch.flow_drop is None or not branch.flow_drop.follow_header:
        return None
    m = static_margin(site, branch, readings)
    if m.empty:
        return None
    drive = (m["header_pa"] - m["static_pa"]).dropna()
    drive = drive[drive > 0]
    if drive.empty:
        return None
    head = readings[readings["tag"] == site.header_pressure_tag]
    step = resolution_by_tag(head).get(site.header_pressure_tag, 0.0)
    if step > FOLLOW_HEADER_SHARE * float(drive.median()):
        return None
    return drive


def flow_drop_settings(site: Site, branch: BranchConfig) -> FlowDropSettings:
    """Flow-drop alarm settings of *branch* (its ``flow_drop`` resolved with the site's
    ``[flow_drop]``; the branch must have it enabled)."""
    fd = branch.flow_drop
    if fd is None:
        raise ValueError(f"branch {branch.name!r} has no flow_drop alarm enabled")
    return FlowDropSettings(
        fraction=fd.fraction, reference=timedelta(seconds=fd.reference_s),
        hold=timedelta(seconds=fd.hold_s), deadband=fd.deadband,
        off_delay=timedelta(seconds=fd.off_delay_s),
        max_gap=timedelta(seconds=condition_lag(site)),
    )


def backflow_settings(site: Site, branch: BranchConfig) -> BackflowAlarmSettings:
    """Back-flow alarm settings of *branch*: the header tag's unit and the site's zone; the
    on-delay none beyond two samples in a row, so the alarm comes within one ingest
    interval of the condition; the off-delay the site's low-flow off-delay."""
    return BackflowAlarmSettings(
        off_delay=timedelta(seconds=site.analysis.low_flow_off_delay),
        max_gap=timedelta(seconds=condition_lag(site)),
        unit=site.tags[site.header_pressure_tag].unit, timezone=site.timezone,
        termination=termination_words(branch),
    )


#: The branch name under which the source-wide stale-data alarm is kept.
SOURCE_ALARM_BRANCH = "source"
SOURCE_ALARM_CONDITION = "stale source"


def stale_after(site: Site) -> float:
    """Age at which a tag's newest reading counts as stale [s].

    ``[analysis] stale_after`` when given; else max(1 h, 4 x ``[schedule] ingest_every``,
    3 x ``[analysis] sample_period``): an hour is long enough that an export written
    hourly is not flagged between files, four ingest intervals ride out a late or
    failed ingest or two, and three sample periods a slowly logged tag (our choice).
    A tag the historian logs only on change (exception reporting) can sit unchanged
    longer: give such a site a larger ``stale_after``.
    """
    given = site.analysis.stale_after
    if given is not None:
        return float(given)
    return max(3600.0, 4.0 * site.schedule.ingest_every, 3.0 * site.analysis.sample_period)


def tag_owners(site: Site) -> dict[str, str]:
    """Every site tag → the branch it belongs to (the first that names it), else "header"."""
    owner: dict[str, str] = {}
    for b in site.branches:
        for tag in (b.flow_tag, b.end_pressure_tag, b.level_tag, b.valve_position_tag):
            if tag is not None:
                owner.setdefault(tag, b.name)
    for tag in site.tags:
        owner.setdefault(tag, "header")
    return dict(sorted(owner.items()))


def alarm_checks(site: Site) -> list[tuple[str, str, str, float | None]]:
    """(branch, condition, tag, limit) of every near-real-time check of the site.

    ``backflow`` (a high-priority alarm) on every branch that can run back
    (`monitor.analysis.backflow.hazard_branches`: no check valve, a termination that holds water or
    pressure), judged on the header pressure against the branch's static back-pressure.
    ``flow_drop`` on every metered branch whose ``flow_drop`` alarm is enabled.

    A tag shared by several branches (a common return header) is judged once, under
    the first branch that names it.
    """
    checks: list[tuple[str, str, str, float | None]] = []
    owner: dict[str, str] = {}
    for b in site.branches:
        if b.flow_tag is not None and b.min_flow_m3s > 0:
            checks.append((b.name, "low_flow", b.flow_tag, b.min_flow_m3s))
        for tag in (b.flow_tag, b.end_pressure_tag):
            if tag is not None:
                owner.setdefault(tag, b.name)
    for tag in (site.header_pressure_tag, site.total_flow_tag):
        if tag is not None:
            owner.setdefault(tag, "header")
    checks += [(branch, f"frozen {tag}", tag, None) for tag, branch in owner.items()]
    checks += [(b.name, "backflow", site.header_pressure_tag, None)
               for b in hazard_branches(site)]
    checks += [(b.name, "flow_drop", b.flow_tag, None) for b in site.branches
               if b.flow_drop is not None and b.flow_tag is not None]
    return checks
