"""Drift diagnosis over the history of branch fits: what changed, since when, how sure.

`diagnose` replays the history window by window in time order and decides at each window
with only the data up to it. A finding's ``start`` and ``kind`` are fixed in the window
that first reports it, so running on the history up to day d and then up to day d+1 gives
the same findings (plus updated evidence and ``end``): the store can upsert on
``(branch, kind, start)``.

The per-branch replay — how fouling, a restriction, a back-pressure change and a meter
fault are told apart (DESIGN §3) — is `monitor.analysis.replay`; this module runs it for every
branch and adds the findings that need no replay: **instrument** (windows whose screening
flagged a tag of the branch: frozen, 3 or more readings out of range, or spiky in
``spike_windows`` windows in a row; those windows never enter the ``r`` analyses, so a
frozen meter is never called fouling) and **imbalance** (|Σ branch − total| beyond its
combined uncertainty for ``imbalance_windows`` windows in a row). Both are one finding
per condition: runs that come back within ``clear_after_s`` are episodes of one finding
(count, share of the time, worst value, first and last episode in its evidence), which
ends when its last episode did, once ``clear_after_s`` has passed. What a resistance
finding costs is `monitor.analysis.cost`. The data types are in `monitor.analysis.findings` and
importable from here.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd

from adapters.fit_record import FitHistory
from monitor.analysis.backflow import BackflowFindingSettings, backflow_findings
from monitor.analysis.findings import (
    BALANCE_COLUMNS,
    END_BY_EVENT,
    HISTORY_COLUMNS,
    KINDS,
    SCREENING_COLUMNS,
    BranchSettings,
    DiagnosisSettings,
    Episodes,
    Finding,
    flow_pair,
)
from monitor.analysis.replay import BranchReplay

__all__ = [
    "BALANCE_COLUMNS",
    "END_BY_EVENT",
    "HISTORY_COLUMNS",
    "KINDS",
    "SCREENING_COLUMNS",
    "BranchSettings",
    "DiagnosisSettings",
    "Finding",
    "diagnose",
    "findings_to_json",
]

logger = logging.getLogger(__name__)


def _check_frame(name: str, frame: pd.DataFrame, columns: Sequence[str]) -> pd.DataFrame:
    if not isinstance(frame, pd.DataFrame):
        raise TypeError(f"{name} must be a pandas DataFrame, got {type(frame).__name__}")
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise ValueError(f"{name} lacks column(s) {missing}; needs {list(columns)}")
    out = frame.copy()
    for col in ("window_start", "window_end", "time"):
        if col in out.columns:
            times = pd.to_datetime(out[col])
            if out.empty:
                out[col] = pd.Series([], dtype="datetime64[ns, UTC]", index=out.index)
                continue
            if times.dt.tz is None:
                raise ValueError(f"{name}.{col} must be timezone-aware (UTC)")
            out[col] = times.dt.tz_convert("UTC")
    return out


def _as_utc(name: str, when: datetime) -> pd.Timestamp:
    ts = pd.Timestamp(when)
    if ts.tzinfo is None:
        raise ValueError(f"{name} must be timezone-aware (UTC), got {when!r}")
    return ts.tz_convert("UTC")


def diagnose(
    history: pd.DataFrame,
    *,
    maintenance: pd.DataFrame | None = None,
    settings: DiagnosisSettings | None = None,
    now: datetime,
    screening: pd.DataFrame | None = None,
    balance: pd.DataFrame | None = None,
    backflow: tuple[pd.DataFrame, BackflowFindingSettings] | None = None,
) -> list[Finding]:
    """All findings on the history of fits up to ``now``.

    Parameters
    ----------
    history : one row per branch-window, columns `HISTORY_COLUMNS` (times UTC-aware,
        ``r`` [-], pressures [Pa], flows [m^3/s])
    maintenance : events with columns ``branch``, ``kind`` (``cleaned``, ``valve_set``,
        ``meter_calibrated`` or any other), ``time`` (UTC-aware); rows with a
        ``withdrawn_at`` time (withdrawn log entries) are ignored
    settings : thresholds and per-branch settings (defaults when None)
    now : the analysis time; windows ending after it and later events are ignored
    screening : instrument screening counts, columns `SCREENING_COLUMNS`
    balance : header mass balance, columns `BALANCE_COLUMNS`
    backflow : hazard samples (`monitor.analysis.backflow.HAZARD_COLUMNS`) and their settings: the
        ``backflow_hazard`` findings (`monitor.analysis.backflow.backflow_findings`)

    Returns
    -------
    Findings sorted by ``start``, ``branch``, ``kind``.
    """
    cfg = settings if settings is not None else DiagnosisSettings()
    t_now = _as_utc("now", now)
    hist = _check_frame("history", history, HISTORY_COLUMNS["required"])
    hist = hist[hist["window_end"] <= t_now].sort_values(["branch", "window_start"])
    events = (
        _check_frame("maintenance", maintenance, ("branch", "kind", "time"))
        if maintenance is not None
        else pd.DataFrame(
            {"branch": [], "kind": [], "time": pd.Series([], dtype="datetime64[ns, UTC]")}
        )
    )
    if "withdrawn_at" in events.columns:  # a withdrawn log entry is not maintenance
        events = events[events["withdrawn_at"].isna()]
    events = events[events["time"] <= t_now].sort_values("time")
    flags, last_screened = _flag_windows(screening, cfg, t_now)
    bal = None
    if balance is not None:
        bal = _check_frame("balance", balance, BALANCE_COLUMNS)
        bal = bal[bal["window_end"] <= t_now].sort_values("window_start")

    findings: list[Finding] = []
    header = flags.get(cfg.header_name, pd.DataFrame({"window_start": []}))
    hist = hist.reset_index(drop=True)
    series = FitHistory.of(hist)
    by_window = None
    if bal is not None and not bal.empty:
        by_window = bal.drop_duplicates("window_start").set_index("window_start")
    # the typed arrays once for the whole history, sliced per branch
    for name, pos in sorted(hist.groupby("branch", sort=True).indices.items()):
        branch = str(name)
        own = flags.get(branch, pd.DataFrame({"window_start": []}))
        excluded = set(own["window_start"]) | set(header["window_start"])
        replay = BranchReplay(branch, series.take(pos), excluded, by_window,
                              cfg.for_branch(branch), cfg)
        findings.extend(replay.run(events[events["branch"] == branch]))
    for name, fl in flags.items():
        findings.extend(_instrument_findings(name, fl, last_screened[name], cfg))
    if bal is not None:
        findings.extend(_imbalance_findings(bal, cfg))
    if backflow is not None:
        findings.extend(backflow_findings(backflow[0], backflow[1], now=t_now))
    findings.sort(key=lambda f: (f.start, f.branch, f.kind))
    logger.debug("diagnosis up to %s: %d findings", t_now, len(findings))
    return findings


def _flag_windows(
    screening: pd.DataFrame | None, cfg: DiagnosisSettings, t_now: pd.Timestamp
) -> tuple[dict[str, pd.DataFrame], dict[str, pd.Timestamp]]:
    """Per branch: the flagged windows (start, end, first flagged time, counts), and the
    end of the last screened window (to tell a cleared fault from an ongoing one)."""
    if screening is None:
        return {}, {}
    scr = _check_frame("screening", screening, SCREENING_COLUMNS)
    scr = scr[scr["window_end"] <= t_now]
    last = {str(k): v for k, v in scr.groupby("branch")["window_end"].max().items()}
    counts = scr[["frozen", "out_of_range", "spikes"]].astype(float).fillna(0.0)
    if "samples" in scr.columns:
        # A few flagged spikes in a short day of coarse samples are transients (a pump
        # start seen by a 7-point Hampel window), not a sick meter: ask for a count too.
        spike_bad = (counts["spikes"] > cfg.spike_fraction * scr["samples"].astype(float)) & (
            counts["spikes"] >= cfg.spike_min_count
        )
    else:
        spike_bad = counts["spikes"] > cfg.spike_count
    bad = (
        (counts["frozen"] > 0) | (counts["out_of_range"] >= cfg.out_of_range_min_count)
        | spike_bad
    )
    scr = scr.assign(
        frozen=counts["frozen"], out_of_range=counts["out_of_range"], spikes=counts["spikes"]
    )[bad]
    if "first_flagged" not in scr.columns:
        scr = scr.assign(first_flagged=scr["window_start"])
    else:
        scr = scr.assign(
            first_flagged=pd.to_datetime(scr["first_flagged"]).fillna(scr["window_start"])
        )
    out: dict[str, pd.DataFrame] = {}
    for name, rows in scr.groupby("branch", sort=True):
        agg = (
            rows.groupby(["window_start", "window_end"], as_index=False)
            .agg(
                first_flagged=("first_flagged", "min"),
                frozen=("frozen", "sum"),
                out_of_range=("out_of_range", "sum"),
                spikes=("spikes", "sum"),
                tags=("tag", lambda s: ",".join(sorted(set(map(str, s))))),
            )
            .sort_values("window_start")
        )
        out[str(name)] = agg.reset_index(drop=True)
    return out, last


def findings_to_json(findings: Sequence[Finding]) -> list[dict[str, Any]]:
    """The findings file of DESIGN §5: a list of JSON-ready dicts."""
    return [f.to_json_dict() for f in findings]


def _runs(starts: Sequence[pd.Timestamp], ends: Sequence[pd.Timestamp], bad: Sequence[bool],
          needed: int) -> list[tuple[int, int | None, int]]:  # fmt: skip
    """Runs of ``bad`` windows at least ``needed`` long: (first, first good after or None,
    index at which the run became long enough)."""
    out: list[tuple[int, int | None, int]] = []
    i, n = 0, len(bad)
    while i < n:
        if not bad[i]:
            i += 1
            continue
        j = i
        while j + 1 < n and bad[j + 1] and starts[j + 1] <= ends[j] + pd.Timedelta(seconds=1):
            j += 1
        if j - i + 1 >= needed:
            out.append((i, j + 1 if j + 1 < n else None, i + needed - 1))
        i = j + 1
    return out


def _episode_groups(runs: list[tuple[pd.Timestamp, pd.Timestamp, Any]],
                    clear_after_s: float) -> list[list[tuple[pd.Timestamp, pd.Timestamp, Any]]]:
    """Runs (start, end, payload) in time order, grouped into one condition each: a run
    that begins less than *clear_after_s* after the previous one ended is an episode of
    the same condition."""
    groups: list[list[tuple[pd.Timestamp, pd.Timestamp, Any]]] = []
    for run in runs:
        if groups and (run[0] - groups[-1][-1][1]).total_seconds() < clear_after_s:
            groups[-1].append(run)
        else:
            groups.append([run])
    return groups


def _episodes(group: Sequence[tuple[pd.Timestamp, pd.Timestamp, Any]]) -> Episodes:
    eps = Episodes(lower_is_worse=False)
    for a, b, _ in group:
        eps.hold(a, b)
        eps.clear()
    return eps


def _when(t: pd.Timestamp, cfg: DiagnosisSettings) -> str:
    return f"{pd.Timestamp(t).tz_convert(cfg.timezone):%Y-%m-%d}"


def _instrument_findings(name: str, flagged: pd.DataFrame, last_end: pd.Timestamp,
                         cfg: DiagnosisSettings) -> list[Finding]:  # fmt: skip
    """One finding per sick meter: runs of flagged windows that come back within
    ``clear_after_s`` are episodes of one finding, which ends when the last one did once
    the meter has been well for ``clear_after_s``."""
    starts, ends = list(flagged["window_start"]), list(flagged["window_end"])
    runs: list[tuple[pd.Timestamp, pd.Timestamp, Any]] = []
    for a, b, _ in _runs(starts, ends, [True] * len(starts), 1):
        last = (b if b is not None else len(starts)) - 1
        run = flagged.iloc[a : last + 1]
        counts = {c: float(run[c].sum()) for c in ("frozen", "out_of_range", "spikes")}
        detected = ends[a]
        if not (counts["frozen"] or counts["out_of_range"]):
            # spikes alone: a busy control loop has its spiky day; a failing transmitter
            # keeps glitching day after day (its windows are left out of r either way)
            if len(run) < cfg.spike_windows:
                continue
            detected = ends[a + cfg.spike_windows - 1]
        runs.append((starts[a], ends[last], (run, detected)))
    out = []
    for group in _episode_groups(runs, cfg.clear_after_s):
        rows = pd.concat([g[2][0] for g in group])
        counts = {c: float(rows[c].sum()) for c in ("frozen", "out_of_range", "spikes")}
        flags = rows[["frozen", "out_of_range", "spikes"]].sum(axis=1)
        what = [c.replace("_", " ") for c, v in counts.items() if v > 0]
        eps = _episodes(group)
        gone = eps.gone(last_end, cfg.clear_after_s)
        until = eps.last_end if gone else max(last_end, eps.last_end)
        more = eps.describe(until, cfg.timezone)
        since = f"; well again since {_when(eps.last_end, cfg)}" if gone else ""
        tags = ", ".join(sorted(set(",".join(rows["tags"]).split(","))))
        out.append(Finding(
            branch=name, kind="instrument",
            start=pd.Timestamp(group[0][2][0]["first_flagged"].iloc[0]).to_pydatetime(),
            detected=pd.Timestamp(group[0][2][1]).to_pydatetime(),
            end=eps.last_end.to_pydatetime() if gone else None,
            confidence=0.9 if counts["frozen"] or counts["out_of_range"] else 0.7,
            evidence={**counts, "windows": float(len(rows)),
                      "worst_window_flags": float(flags.max()), **eps.evidence(until)},
            message=f"{name}: instrument {tags} "
            f"{'looked' if gone else 'looks'} faulty ({', '.join(what)})"
            f"{f' in {more}' if more else ''}{since}; its windows are left out of the "
            "resistance analysis.",
        ))  # fmt: skip
    return out


def _imbalance_findings(bal: pd.DataFrame, cfg: DiagnosisSettings) -> list[Finding]:
    """One finding per imbalance condition (runs of ``imbalance_windows`` windows or more
    beyond the uncertainty, coming back within ``clear_after_s``: episodes of it)."""
    out = []
    groups = bal.groupby("header") if "header" in bal.columns else [(cfg.header_name, bal)]
    unit = cfg.balance_flow_unit
    for name, rows in groups:
        rows = rows.reset_index(drop=True)
        res = rows["residual_m3s"].astype(float).to_numpy()
        u = rows["uncertainty_m3s"].astype(float).to_numpy()
        bad = list(np.abs(res) > u)
        starts, ends = list(rows["window_start"]), list(rows["window_end"])
        last_end = ends[-1] if ends else None
        runs: list[tuple[pd.Timestamp, pd.Timestamp, Any]] = []
        for a, b, det in _runs(starts, ends, bad, cfg.imbalance_windows):
            last = (b if b is not None else len(bad)) - 1
            runs.append((starts[a], ends[last], (a, last, det)))
        for group in _episode_groups(runs, cfg.clear_after_s):
            idx = np.concatenate([np.arange(a, last + 1) for _, _, (a, last, _) in group])
            ratio = float(np.mean(np.abs(res[idx]) / u[idx]))
            mean = float(np.mean(res[idx]))
            worst = float(res[idx][np.argmax(np.abs(res[idx]))])
            sign = "more" if mean > 0 else "less"
            eps = _episodes(group)
            assert last_end is not None
            gone = eps.gone(last_end, cfg.clear_after_s)
            until = eps.last_end if gone else last_end
            more = eps.describe(until, cfg.timezone)
            a0, _, det = group[0][2]
            (size,), _lim = flow_pair([abs(mean)], 0.0, unit)
            out.append(Finding(
                branch=str(name), kind="imbalance", start=starts[a0].to_pydatetime(),
                detected=ends[det].to_pydatetime(),
                end=eps.last_end.to_pydatetime() if gone else None,
                confidence=float(min(0.99, 1.0 - math.exp(-(ratio - 1.0) * len(idx)))),
                evidence={"mean_residual_m3s": mean, "uncertainty_m3s": float(np.mean(u[idx])),
                          "ratio_to_uncertainty": ratio, "windows": float(len(idx)),
                          "worst_residual_m3s": worst, **eps.evidence(until)},
                message=f"{name}: the branch meters add up to {size} {unit} "
                f"{sign} than the total meter, {ratio:.1f}× their combined uncertainty "
                f"(leak, unmetered draw or meter drift){f'; {more}' if more else ''}.",
            ))  # fmt: skip
    return out
