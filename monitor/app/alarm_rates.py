"""The alarm system's performance: `alarm_rate_summary` computes the EEMUA 191 figures
of an alarm journal (`monitor.app.alarms.AlarmEvent`): floods (> 10 alarms in 10 min),
chattering alarms (3 activations within 1 min) and stale alarms (active > 24 h).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta

from monitor.app.alarms import AlarmEvent

__all__ = [
    "AlarmRateSummary",
    "alarm_rate_summary",
]

#: EEMUA 191 figures (REFERENCES.md): a flood is more than 10 alarms in 10 min; an alarm
#: that activates 3 times within a minute is chattering; in alarm over 24 h is stale.
FLOOD_COUNT = 10
FLOOD_WINDOW = timedelta(minutes=10)
CHATTER_COUNT = 3
CHATTER_WINDOW = timedelta(minutes=1)
STALE_AFTER = timedelta(hours=24)


@dataclass(frozen=True)
class AlarmRateSummary:
    """EEMUA 191 figures of an alarm journal.

    activations : number of annunciated alarms [-]
    per_10_min : average activations per 10 min over the journal's span [-]
    max_in_10_min : the most activations in any 10-min window [-]
    floods : (start, count) of each flood: a run of 10-min windows with more than 10
    chattering : (branch, condition) that activated 3 times within 1 min
    stale : (branch, condition, since) in alarm for over 24 h (at ``now``, or before they
        returned)
    """

    activations: int
    per_10_min: float
    max_in_10_min: int
    floods: tuple[tuple[datetime, int], ...]
    chattering: tuple[tuple[str, str], ...]
    stale: tuple[tuple[str, str, datetime], ...]


def alarm_rate_summary(events: Sequence[AlarmEvent], *, now: datetime) -> AlarmRateSummary:
    """Flood, chattering and stale figures (EEMUA 191) of ``events`` up to ``now``."""
    evs = sorted((e for e in events if e.time <= now), key=lambda e: e.time)
    acts = [e for e in evs if e.action == "activated"]
    times = [e.time for e in acts]
    floods: list[tuple[datetime, int]] = []
    peak, lo, flooding = 0, 0, False
    for hi, t in enumerate(times):
        while times[lo] <= t - FLOOD_WINDOW:
            lo += 1
        count = hi - lo + 1  # activations in the 10 min ending at this one
        peak = max(peak, count)
        if count > FLOOD_COUNT and flooding:
            floods[-1] = (floods[-1][0], max(floods[-1][1], count))
        elif count > FLOOD_COUNT:
            floods.append((times[lo], count))
        flooding = count > FLOOD_COUNT
    chatter: set[tuple[str, str]] = set()
    by_key: dict[tuple[str, str], list[datetime]] = {}
    for e in acts:
        by_key.setdefault((e.branch, e.condition), []).append(e.time)
    for key, ts in by_key.items():
        for k in range(len(ts) - CHATTER_COUNT + 1):
            if ts[k + CHATTER_COUNT - 1] - ts[k] <= CHATTER_WINDOW:
                chatter.add(key)
                break
    stale: list[tuple[str, str, datetime]] = []
    since: dict[tuple[str, str], datetime] = {}
    for e in evs:
        key = (e.branch, e.condition)
        if e.action == "activated":
            since.setdefault(key, e.time)
        elif e.action in ("returned", "removed_from_service", "reset") and key in since:
            start = since.pop(key)
            if e.time - start > STALE_AFTER:
                stale.append((*key, start))
    stale += [(*key, start) for key, start in since.items() if now - start > STALE_AFTER]
    span = (now - evs[0].time) if evs else timedelta(0)
    per = len(acts) / max(span / FLOOD_WINDOW, 1.0)
    return AlarmRateSummary(
        activations=len(acts), per_10_min=per, max_in_10_min=peak, floods=tuple(floods),
        chattering=tuple(sorted(chatter)), stale=tuple(sorted(stale)),
    )  # fmt: skip
