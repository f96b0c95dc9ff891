"""The near-real-time alarm checks over the samples not yet judged (`evaluate_alarms`,
after each ingest; `ingest_and_watch` runs both) and over a past period
(`replay_alarms`): low flow, frozen meter, back-flow, flow drop and stale data, each an
ISA-18.2 alarm whose state the store keeps.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pandas as pd

from adapters.base import BranchwatchAdapterError, ReadingsSource, ResultsStore, StoreError
from monitor.analysis.backflow import cannot_flow, near_zero, static_margin
from monitor.analysis.diagnose import Finding
from monitor.app.alarm_instruments import (
    FrozenSettings,
    StaleSettings,
    evaluate_frozen,
    evaluate_stale,
)
from monitor.app.alarm_points import (
    SOURCE_ALARM_BRANCH,
    SOURCE_ALARM_CONDITION,
    alarm_checks,
    alarm_row,
    alarm_state_from_row,
    backflow_settings,
    condition_lag,
    driving_pressure,
    flow_drop_settings,
    low_flow_settings,
    stale_after,
    tag_owners,
)
from monitor.app.alarm_process import evaluate_backflow, evaluate_flow_drop, evaluate_low_flow
from monitor.app.alarms import AlarmEvent, AlarmState
from monitor.app.ingest import IngestSummary, ingest, read_tags
from monitor.site.config import Site

log = logging.getLogger(__name__)

__all__ = [
    "WatchPass",
    "evaluate_alarms",
    "ingest_and_watch",
    "newest_readings",
    "replay_alarms",
]


#: How far back the first low-flow evaluation of a branch looks [s].
ALARM_FIRST_LOOKBACK_S = 86_400.0


def evaluate_alarms(
    site: Site, store: ResultsStore, source: ReadingsSource, *, now: datetime
) -> list[AlarmEvent]:
    """Run the near-real-time checks over the samples not yet seen; called after ingest.

    Three conditions, each an ISA-18.2 alarm with its own state: **low flow** per metered
    branch, **frozen meter** per flow and pressure transmitter (a reading that has not
    moved at all for ``[analysis] frozen_hold``), and **stale data** per tag and per
    source (`stale_after`). The alarms' memory (delays, held value, last sample) is
    stored, so a restart neither repeats nor drops an alarm; a low-flow message names the
    likely cause from the latest open findings.

    A source that cannot be read now (unreachable database) leaves the low-flow and
    frozen alarms as they were — there is nothing new to judge — and is logged; the
    stale-data alarms are judged all the same, on the newest readings stored. Only a
    results store that cannot be read or written stops the evaluation (raised).
    """
    stored = store.read_alarms()
    states = {
        (str(r["branch"]), str(r["condition"])): alarm_state_from_row(r)
        for r in stored.to_dict(orient="records")
    }
    rows: list[dict[str, Any]] = []
    events: list[AlarmEvent] = []
    try:
        _sample_alarms(site, store, source, states, now, rows, events)
    except (BranchwatchAdapterError, ConnectionError, OSError) as exc:
        if isinstance(exc, StoreError):
            raise
        log.warning("low-flow and frozen alarms not judged now: the readings of %s cannot be "
                    "read (%s); the stale-data alarms are judged all the same",
                    source.name, exc)
    _stale_alarms(site, store, source, states, now, rows, events)
    _store_alarms(store, rows, events)
    for e in events:
        log.warning("alarm %s %s %s: %s", e.branch, e.condition, e.action, e.message)
    return events


def _store_alarms(
    store: ResultsStore, rows: list[dict[str, Any]], events: Sequence[AlarmEvent]
) -> None:
    """Store the alarms' new states so that the journal gets every event at its own time.

    The store journals a change of state with the row's ``updated`` time; an alarm that
    came on and returned within one evaluation would otherwise leave only its last state,
    stamped with the evaluation time. So each earlier event of an alarm is written first,
    in time order, and the final row carries the time of its last event.
    """
    final = {(r["branch"], r["condition"]): r for r in rows}
    by_key: dict[tuple[str, str], list[AlarmEvent]] = {}
    for e in events:
        by_key.setdefault((e.branch, e.condition), []).append(e)
    steps: list[tuple[datetime, dict[str, Any]]] = []
    for key, evs in by_key.items():
        row = final.get(key)
        if row is None:
            continue
        steps += [(e.time, {**row, "state": e.state.value, "message": e.message,
                            "value": e.value, "updated": e.time}) for e in evs[:-1]]
        row["updated"] = evs[-1].time
    for _, step in sorted(steps, key=lambda item: item[0]):
        store.upsert_alarms([step])
    if rows:
        store.upsert_alarms(rows)


def replay_alarms(
    site: Site, store: ResultsStore, source: ReadingsSource, start: datetime, end: datetime
) -> list[AlarmEvent]:
    """Judge the sample-driven alarms (low flow, frozen meter, back-flow, flow drop) over
    a past period [start, end): what `evaluate_alarms` does at each ingest, for readings that
    arrived late (a backfill of older files), which the live checks never see — they
    look back only `ALARM_FIRST_LOOKBACK_S` before the wall clock.

    Each event is journalled at its own historic time (the sample that caused it), not
    at the time of the replay, and messages name their historic times: nothing reads as
    new today. A check continues from the last sample it judged; one that has already
    judged samples at or after *end* has nothing to replay (logged). The stale-data
    alarms are not replayed: they judge when data arrived, which a backfill cannot know.
    """
    if end <= start:
        raise ValueError(f"end must be after start, got {start.isoformat()} .. {end.isoformat()}")
    stored = store.read_alarms()
    states = {
        (str(r["branch"]), str(r["condition"])): alarm_state_from_row(r)
        for r in stored.to_dict(orient="records")
    }
    ahead = sorted(f"{b} {c}" for (b, c), st in states.items()
                   if st.last_sample is not None and st.last_sample >= end
                   and not c.startswith("stale"))  # fmt: skip
    if ahead:
        log.info("alarm replay %s .. %s: already judged past its end, left as they are: %s",
                 start, end, ", ".join(ahead))
    rows: list[dict[str, Any]] = []
    events: list[AlarmEvent] = []
    _sample_alarms(site, store, source, states, end, rows, events, first_lookback=start)
    _store_alarms(store, rows, events)
    for e in events:
        log.info("alarm replayed %s %s %s at %s: %s", e.branch, e.condition, e.action,
                 e.time, e.message)
    return events


def _sample_alarms(
    site: Site, store: ResultsStore, source: ReadingsSource,
    states: Mapping[tuple[str, str], AlarmState], now: datetime,
    rows: list[dict[str, Any]], events: list[AlarmEvent],
    *, first_lookback: datetime | None = None,
) -> None:
    """The low-flow, frozen and back-flow checks over the new samples (appends to rows,
    events). *first_lookback*: where a check never judged before starts (default
    `ALARM_FIRST_LOOKBACK_S` before *now*)."""
    findings = _open_findings(store)
    checks = alarm_checks(site)
    first = first_lookback or now - timedelta(seconds=ALARM_FIRST_LOOKBACK_S)
    tags = sorted({tag for _, _, tag, _ in checks} | set(_condition_tags(site)))
    since_all = min(
        ((states[(b, c)].last_sample or first) if (b, c) in states else first)
        for b, c, _, _ in checks
    ) if checks else now
    # the condition tags' newest reading before the first new header sample counts too,
    # and a flow-drop check needs its reference span before its first new sample
    lag = max([condition_lag(site)] + [
        flow_drop_settings(site, site.branch(b)).lookback.total_seconds()
        for b, c, _, _ in checks if c == "flow_drop"])
    readings = read_tags(site, store, source, tags, since_all - timedelta(seconds=lag), now)
    good = readings[readings["good"].to_numpy(bool)]
    by_tag = {str(t): part for t, part in good.groupby("tag")}
    frozen = FrozenSettings(hold=timedelta(seconds=site.analysis.frozen_hold))
    resting = cannot_flow(site, good)
    for branch, condition, tag, limit in checks:
        key = (branch, condition)
        state = states.get(key, AlarmState(branch=branch, condition=condition))
        part = by_tag.get(tag)
        series = (pd.Series(part["value"].to_numpy(float), index=pd.DatetimeIndex(part["time"]))
                  if part is not None else pd.Series([], dtype=float,
                                                    index=pd.DatetimeIndex([], tz="UTC")))
        if state.last_sample is None and not series.empty and condition != "flow_drop":
            series = series[series.index >= pd.Timestamp(first)]
        spec = site.tags[tag]
        if condition == "flow_drop":
            # the whole series: the level needs the samples before the first judged one
            judged = state if state.last_sample is not None else replace(
                state, last_sample=first - timedelta(microseconds=1))
            b = site.branch(branch)
            frozen_now = _frozen_spans(states, events, tag)
            new, happened = evaluate_flow_drop(
                series, judged, flow_drop_settings(site, b), now, unit=spec.unit,
                timezone=site.timezone, resting=_either(resting.get(tag), frozen_now),
                driving=driving_pressure(site, b, good))
            if new.last_sample == judged.last_sample:
                new = state  # nothing new judged: nothing to store
        elif condition == "low_flow":
            new, happened = evaluate_low_flow(
                series, state, low_flow_settings(site, site.branch(branch)), now,
                diagnosis=[f for f in findings if f.branch == branch],
                unit=spec.unit, timezone=site.timezone,
            )
        elif condition == "backflow":
            b = site.branch(branch)
            samples = static_margin(site, b, good)
            if state.last_sample is None:
                samples = samples[samples.index >= pd.Timestamp(first)]
            new, happened = evaluate_backflow(samples, state, backflow_settings(site, b), now)
        else:
            new, happened = evaluate_frozen(
                series, state, frozen, now, tag=tag, unit_label=spec.unit, kind=spec.kind,
                timezone=site.timezone, no_flow=resting.get(tag),
                near_zero=near_zero(site, tag),
            )
        events.extend(happened)
        if new != state or key not in states:
            rows.append(alarm_row(new, limit_m3s=limit, now=now))


def _frozen_spans(states: Mapping[tuple[str, str], AlarmState],
                  events: Sequence[AlarmEvent], tag: str) -> pd.Series | None:
    """True while the frozen-meter alarm of *tag* is active (from its stored state and
    this evaluation's events), None when it never was: a frozen meter's flat reading
    against a moving header is the frozen alarm's business, so the flow-drop check
    leaves those samples alone (designed suppression, ISA-18.2)."""
    condition = f"frozen {tag}"
    before = next((st for (_, c), st in states.items() if c == condition), None)
    flips = [(e.time, e.action == "activated") for e in events
             if e.condition == condition and e.action in ("activated", "returned")]
    if not flips and not (before is not None and before.active):
        return None
    start = pd.Timestamp("1970-01-01", tz="UTC")
    times = [start] + [pd.Timestamp(t) for t, _ in flips]
    values = [bool(before is not None and before.active)] + [on for _, on in flips]
    return pd.Series(values, index=pd.DatetimeIndex(times))


def _either(a: pd.Series | None, b: pd.Series | None) -> pd.Series | None:
    """The OR of two step masks (bool, on UTC times, each holding until its next time)."""
    if a is None or b is None:
        return a if b is None else b
    index = pd.DatetimeIndex(a.index).union(pd.DatetimeIndex(b.index))

    def on(m: pd.Series) -> np.ndarray:
        m = m[~pd.DatetimeIndex(m.index).duplicated(keep="last")].sort_index()
        return m.astype(float).reindex(index, method="ffill").fillna(0.0).to_numpy() > 0.5

    return pd.Series(on(a) | on(b), index=index)


def _condition_tags(site: Site) -> list[str]:
    """Tags the back-flow check and the frozen exemption need besides the checked ones."""
    tags = {site.header_pressure_tag, site.header_temperature_tag, site.total_flow_tag,
            site.pump_speed_tag}
    for b in site.branches:
        tags |= {b.level_tag, b.end_pressure_tag}
    return sorted(t for t in tags if t is not None)


def _stale_alarms(
    site: Site, store: ResultsStore, source: ReadingsSource,
    states: Mapping[tuple[str, str], AlarmState], now: datetime,
    rows: list[dict[str, Any]], events: list[AlarmEvent],
) -> None:
    """The stale-data checks: one per tag, one for the source (appends to rows, events).

    While no tag has fresh data the source alarm stands for them all and the per-tag
    alarms are left as they were: one alarm for one lost link, not one per tag (an alarm
    flood is what EEMUA 191 warns of). They are judged again once any data flows.
    """
    settings = StaleSettings(stale_after=timedelta(seconds=stale_after(site)))
    newest = newest_readings(store)
    owners = tag_owners(site)
    key = (SOURCE_ALARM_BRANCH, SOURCE_ALARM_CONDITION)
    src_state = states.get(key, AlarmState(branch=key[0], condition=key[1]))
    known = [t for t in newest.values()] + [
        s.last_sample for k, s in states.items()
        if k[1].startswith("stale ") and k != key and s.last_sample is not None
    ]
    new_src, happened = evaluate_stale(
        max(known) if known else None, src_state, settings, now,
        subject=f"any tag of source {source.name}", timezone=site.timezone,
    )
    events.extend(happened)
    if new_src != src_state or key not in states:
        rows.append(alarm_row(new_src, limit_m3s=settings.stale_after.total_seconds(), now=now))
    if new_src.active:
        return
    for tag, branch in owners.items():
        k = (branch, f"stale {tag}")
        state = states.get(k, AlarmState(branch=branch, condition=k[1]))
        subject = f"{tag} ({branch})" if branch != "header" else f"{tag} (header)"
        new, happened = evaluate_stale(newest.get(tag), state, settings, now,
                                       subject=subject, timezone=site.timezone)
        events.extend(happened)
        if new != state or k not in states:
            rows.append(alarm_row(new, limit_m3s=settings.stale_after.total_seconds(), now=now))


def newest_readings(store: ResultsStore) -> dict[str, datetime]:
    """Tag → time of its newest stored reading (every ingested source stores its readings)."""
    marks = store.watermarks().readings
    return {str(t): pd.Timestamp(v).to_pydatetime()
            for t, v in zip(marks["tag"], marks["last"], strict=True) if pd.notna(v)}


@dataclass(frozen=True)
class WatchPass:
    """One ingest followed by the alarm checks.

    ``summary`` is None when the ingest failed; ``error`` then says why.
    """

    summary: IngestSummary | None
    error: BaseException | None
    events: list[AlarmEvent]


def ingest_and_watch(
    site: Site, store: ResultsStore, source: ReadingsSource,
    *, run_ingest: Callable[[], IngestSummary] | None = None,
    clock: Callable[[], datetime] = lambda: datetime.now(UTC),
) -> WatchPass:
    """Ingest, then evaluate the alarms — also when the ingest failed.

    A failed ingest (source unreachable, store refused a batch) is logged and returned,
    not raised: the alarm checks run after it all the same, the stale-data check first of
    all (this is when data stops). *run_ingest* lets the caller wrap the ingest (the CLI
    records it as a job run); by default it is `ingest`. An error of the alarm checks
    themselves (the store is down) is raised.
    """
    error: BaseException | None = None
    summary: IngestSummary | None = None
    try:
        summary = run_ingest() if run_ingest is not None else ingest(site, store, source)
    except Exception as exc:  # recorded and logged; the alarms are judged all the same
        error = exc
        log.error("ingest from %s failed (%s: %s); the alarm checks run all the same",
                  source.name, type(exc).__name__, exc)
    events = evaluate_alarms(site, store, source, now=clock())
    return WatchPass(summary=summary, error=error, events=events)


def _open_findings(store: ResultsStore) -> list[Finding]:
    frame = store.read_findings()
    out = []
    for r in frame.to_dict(orient="records"):
        if r.get("end") is not None and not pd.isna(r["end"]):
            continue
        out.append(Finding(
            branch=str(r["branch"]), kind=str(r["kind"]),
            start=pd.Timestamp(r["start"]).to_pydatetime(),
            detected=pd.Timestamp(r["detected"]).to_pydatetime(), end=None,
            confidence=float(r["confidence"]), evidence=dict(r.get("evidence") or {}),
            message=str(r["message"]),
        ))
    return out
