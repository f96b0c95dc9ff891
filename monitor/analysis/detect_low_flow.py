"""Low flow, the daily record: window mean flow below the branch minimum.

The near-real-time alarm is `monitor.app.alarm_process`; this is its record in the findings.
One finding per condition: each run of windows whose mean flow is below the minimum (cleared
``low_flow_deadband`` above it) is an episode of it (`monitor.analysis.findings.Episodes`); spells
that come back within ``clear_after_s`` are the same condition, and it ends when its last
episode did, once ``clear_after_s`` has passed without another.
"""

from __future__ import annotations

import math

import pandas as pd

from monitor.analysis.findings import Episodes
from monitor.analysis.replay_text import low_flow
from monitor.analysis.replay_track import BranchTrack, Change, OpenFinding

__all__ = ["LowFlowDetector"]


class LowFlowDetector:
    """Low flow of one branch, window by window (see the module docstring)."""

    def __init__(self, track: BranchTrack) -> None:
        self.t = track

    def expire(self, when: pd.Timestamp) -> list[Change]:
        """End a low-flow finding whose condition has stayed away ``clear_after_s`` by
        *when*: it ended when its last episode did."""
        t = self.t
        n = len(t.changes)
        lf = t.open_findings.get("low_flow")
        eps = None if lf is None else lf.episodes
        if lf is not None and eps is not None and eps.gone(when, t.cfg.clear_after_s):
            # its share of the time counts up to its end, not to the week after it
            lf.evidence.update(eps.evidence(eps.last_end))
            lf.message = self._message(lf, eps, eps.last_end)
            t.end("low_flow", eps.last_end)
        return t.since(n)

    def window(self, i: int) -> list[Change]:
        """Window i's mean flow against the minimum."""
        t = self.t
        qmin = t.bs.min_flow_m3s
        if qmin is None:
            return []
        n = len(t.changes)
        self.expire(t.ws[i])
        q = t.col["mean_flow_m3s"][i]
        if not math.isfinite(q) or t.ws[i] in t.flagged:
            return t.since(n)
        lf = t.open_findings.get("low_flow")
        if lf is None:
            if q >= qmin:
                return t.since(n)
            lf = OpenFinding("low_flow", t.ws[i], t.we[i], 0.9, {}, "", episodes=Episodes())
            t.open(lf)
        eps = lf.episodes
        assert eps is not None
        clear = qmin * (1.0 + t.cfg.low_flow_deadband)
        if q < qmin or (eps.active and q < clear):
            eps.hold(t.ws[i], t.we[i], float(q))
            lf.evidence["mean_flow_m3s"] = float(q)
        else:
            eps.clear()
        lf.evidence.update({"min_flow_m3s": qmin, "clear_flow_m3s": clear,
                            "lowest_flow_m3s": eps.worst, "in_condition": float(eps.active),
                            **eps.evidence(t.we[i])})  # fmt: skip
        lf.message = self._message(lf, eps, t.we[i], i)
        return t.since(n)

    def _message(self, lf: OpenFinding, eps: Episodes, until: pd.Timestamp,
                 i: int | None = None) -> str:  # fmt: skip
        t = self.t
        # the likely cause is whatever else is open on the branch, as it stands now
        causes = [k.replace("_", "-") for k in t.open_findings if k != "low_flow"]
        return low_flow(
            t.name, eps, until, q_m3s=float(lf.evidence["mean_flow_m3s"]),
            qmin_m3s=float(lf.evidence["min_flow_m3s"]), unit=t.bs.flow_unit,
            timezone=t.cfg.timezone, deadband=t.cfg.low_flow_deadband,
            day=t.when(t.ws[i] if i is not None else eps.spans[-1][0]), causes=causes,
        )  # fmt: skip
