"""Accuracy of the diagnosis on simulated site-years with random faults (issue 4 part 7).

Each site-year is the example site (`config/example-site.toml`, six branches) simulated
for a year with its own seed and four faults on four different branches, drawn at
random (seeded): a restriction step (r × 1.3–1.8), a fouling ramp (linear or asymptotic,
to r_end 1.5–2.0, reaching r = 1.5 after 60–150 days), a back-pressure step (±0.2–0.5 bar
on the tank branch, ±0.2–0.3 bar on the held process header, whose margin at night is
small) and a frozen flow meter (1–4 days). The other two branches stay clean all year.

The data go through the product's code path without files or a store: per window of
`monitor.app.windows.windows` (the site's local days),
`monitor.analysis.window.analyze_window` on the simulated readings; then one
`monitor.analysis.diagnose.diagnose` over the collected fit rows,
screening counts and balances, with the columns the store keeps — as
`monitor.app.site_diagnosis.diagnose_site` does with stored ones.

Printed per fault kind: recall (found with the right kind within the goal's time, and at
any time), wrong-kind rate (another resistance, back-pressure or instrument finding on
the branch within the fault's horizon, before the right one), median detection delay
(``detected`` − true onset); false findings per clean branch-year (clean branches, and
faulted branches before their fault); median |r − r_true| / r_true over usable fits of
windows where r_true is constant and no meter is faulted. Then the goals, met or not.

Then the alarm load (EEMUA 191) of the near-real-time checks the daemon runs at each ingest
(`monitor.app.alarm_points.alarm_checks`: low flow per branch, frozen meter per flow and
pressure tag; `monitor.app.alarm_process.evaluate_low_flow` /
`monitor.app.alarm_instruments.evaluate_frozen` with the site's settings, as
`monitor.app.alarm_watch.evaluate_alarms` calls them) over each simulated year, summed by
`monitor.app.alarm_rates.alarm_rate_summary`: alarms per operator-hour (one operator for the site),
the peak count in any 10 minutes, standing alarms (in alarm over 24 h) and chattering
ones (3 activations within a minute). The stale-data alarm never fires on simulated
data (no gaps) and is not counted.

``--cache DIR`` keeps each site-year's analysis (fits, screening, balance, alarm journal)
in DIR and reuses it, so a change of the diagnosis alone is measured in seconds.

    .venv/bin/python benchmarks/diagnosis.py [--sites 20] [--seed 1] [--step-s 300]
        [--workers 2] [--cache DIR]
"""

from __future__ import annotations

import argparse
import math
import pickle
import time
import tomllib
from collections import Counter
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from adapters.fit_record import WindowFit
from adapters.migrations.tables import header_balance_t, window_checks_t
from model.simulate import (
    BackPressureStep,
    Fault,
    FoulingRamp,
    FrozenMeter,
    Simulation,
    StepRestriction,
)
from monitor.analysis.diagnose import Finding, diagnose
from monitor.analysis.window import analyze_window
from monitor.app.alarm_instruments import FrozenSettings, evaluate_frozen
from monitor.app.alarm_points import alarm_checks, low_flow_settings
from monitor.app.alarm_process import evaluate_low_flow
from monitor.app.alarm_rates import alarm_rate_summary
from monitor.app.alarms import AlarmEvent, AlarmState
from monitor.app.demo import simulate_site
from monitor.app.site_diagnosis import diagnosis_settings
from monitor.app.windows import windows
from monitor.site.config import Site, parse_site

EXAMPLE = Path(__file__).resolve().parent.parent / "config" / "example-site.toml"
YEAR_START = datetime(2026, 1, 1, tzinfo=UTC)
DAY = timedelta(days=1)
#: Branches whose termination pressure a back-pressure step may move: the vented tank
#: (not logged: the gas-blanket equivalent) and the held process header (logged). The
#: return header's tag is shared by three branches, so a step on one would not be theirs.
BP_BRANCHES = {"B3-quench": (0.2e5, 0.5e5), "B4-process": (0.2e5, 0.3e5)}
RESISTANCE_KINDS = frozenset({"fouling", "restriction", "back_pressure", "instrument"})
SCREENING_KEEP = tuple(c.name for c in window_checks_t.columns)
BALANCE_KEEP = tuple(c.name for c in header_balance_t.columns)

GOALS = {
    "restriction": 0.95,  # found within 1 day, steps >= +30 %
    "fouling": 0.95,  # found before r passes 1.25
    "back_pressure": 0.90,  # found within 1 day with the right kind
    "instrument": 1.0,  # frozen meters within 6 h (every one)
}
GOAL_FALSE_PER_BRANCH_YEAR = 0.5
GOAL_R_ERROR = 0.02


def site_for(step_s: float) -> Site:
    """The example site with its analysis grid at the sample step (at least 1 min)."""
    doc = tomllib.loads(EXAMPLE.read_text(encoding="utf-8"))
    doc.pop("store", None)
    doc.pop("source", None)
    doc.setdefault("analysis", {})["sample_period"] = f"{max(60.0, step_s):g} s"
    return parse_site(doc, path=EXAMPLE)


@dataclass(frozen=True)
class Injected:
    kind: str
    branch: str
    onset: datetime
    #: restriction ratio, fouling r_end, back-pressure step [Pa], frozen days
    size: float
    #: the time by which the goal wants it found
    deadline: datetime
    #: findings on the branch up to here are about this fault
    horizon: datetime
    tag: str = ""


def draw_faults(site: Site, rng: np.random.Generator) -> tuple[list[Fault], list[Injected]]:
    """Four faults on four different branches of one site-year."""
    names = [b.name for b in site.branches]
    bp_branch = str(rng.choice(sorted(BP_BRANCHES)))
    rest = [n for n in names if n != bp_branch]
    rng.shuffle(rest)
    restr_b, foul_b, frozen_b = rest[:3]
    end = YEAR_START + timedelta(days=365)
    faults: list[Fault] = []
    out: list[Injected] = []

    t = YEAR_START + timedelta(days=float(rng.uniform(40, 330)))
    ratio = float(rng.uniform(1.3, 1.8))
    faults.append(StepRestriction(restr_b, t, ratio=ratio))
    out.append(Injected("restriction", restr_b, t, ratio, t + DAY, min(end, t + 7 * DAY)))

    # The goal's ramps reach 1.5 in 60 days or more: draw that time (60-150 days), then
    # the ramp that takes it (linear, or asymptotic with τ = days/3).
    shape = str(rng.choice(["linear", "asymptotic"]))
    to_150 = float(rng.uniform(60, 150))
    if shape == "linear":
        r_end = float(rng.uniform(1.5, 2.0))
        days = to_150 * (r_end - 1.0) / 0.5
        to_125 = to_150 / 2.0
    else:
        r_end = float(rng.uniform(1.6, 2.0))
        tau = to_150 / -math.log(1.0 - 0.5 / (r_end - 1.0))
        days = 3.0 * tau
        to_125 = -tau * math.log(1.0 - 0.25 / (r_end - 1.0))
    latest = 365.0 - to_125 - 5.0
    t = YEAR_START + timedelta(days=float(rng.uniform(25, max(26.0, latest))))
    faults.append(FoulingRamp(foul_b, t, days=days, r_end=r_end, shape=shape))  # type: ignore[arg-type]
    cross = t + timedelta(days=to_125)
    out.append(Injected("fouling", foul_b, t, r_end, cross,
                        min(end, t + timedelta(days=max(days, to_150)))))

    t = YEAR_START + timedelta(days=float(rng.uniform(40, 330)))
    lo, hi = BP_BRANCHES[bp_branch]
    delta = float(rng.uniform(lo, hi)) * float(rng.choice([-1.0, 1.0]))
    faults.append(BackPressureStep(bp_branch, t, delta_pa=delta))
    out.append(Injected("back_pressure", bp_branch, t, delta, t + DAY, min(end, t + 7 * DAY)))

    t = YEAR_START + timedelta(days=float(rng.uniform(30, 350)))
    length = float(rng.uniform(1, 4))
    tag = site.branch(frozen_b).flow_tag or ""
    faults.append(FrozenMeter(tag, t, t + timedelta(days=length)))
    out.append(Injected("instrument", frozen_b, t, length, t + timedelta(hours=6),
                        t + timedelta(days=length + 1), tag=tag))
    return faults, out


def _window_frame(site: Site, sim: Simulation, i0: int, i1: int) -> pd.DataFrame:
    """Readings frame (time UTC, tag, value SI, good) of samples i0..i1 of *sim*."""
    times = pd.DatetimeIndex(sim.times[i0:i1]).tz_localize("UTC")
    tags = [t for t in sim.values if t in site.tags]
    n = len(times)
    return pd.DataFrame({
        "time": times[np.tile(np.arange(n), len(tags))],
        "tag": np.repeat(np.array(tags, dtype=object), n),
        "value": np.concatenate([sim.values[t][i0:i1] for t in tags]),
        "good": True,
    })


@dataclass
class SiteResult:
    seed: int
    injected: list[Injected]
    findings: list[Finding]
    r_errors: list[float]
    clean_branch_years: float
    false_findings: list[Finding] = field(default_factory=list)
    cpu_s: float = 0.0
    wall_s: float = 0.0
    windows: int = 0
    history: pd.DataFrame | None = None
    #: frozen-meter alarms of the ingest-time check: (tag, time the ingest raised it)
    frozen_alarms: list[tuple[str, datetime]] = field(default_factory=list)
    #: the journal of the near-real-time alarms over the year (see `alarm_journal`)
    alarm_events: list[AlarmEvent] = field(default_factory=list)
    end: datetime = YEAR_START


@dataclass
class Analysed:
    """What the analysis of one site-year leaves for the diagnosis (cached by --cache)."""

    seed: int
    injected: list[Injected]
    history: pd.DataFrame
    screening: pd.DataFrame
    balance: pd.DataFrame | None
    r_errors: list[float]
    windows: int
    end: datetime
    frozen_alarms: list[tuple[str, datetime]]
    alarm_events: list[AlarmEvent]
    cpu_s: float


def analyse_site(seed: int, step_s: float) -> Analysed:
    """Simulate and analyse one site-year: the fit rows, screening and balance the store
    would keep, and the year's alarm journal."""
    c0 = time.process_time()
    site = site_for(step_s)
    rng = np.random.default_rng(seed)
    faults, injected = draw_faults(site, rng)
    end = YEAR_START + timedelta(days=365)
    sim = simulate_site(site, YEAR_START, end, faults=faults, step_s=step_s, seed=seed)
    t_ns = sim.times.astype("datetime64[ns]")
    fits: list[dict[str, Any]] = []
    screening: list[pd.DataFrame] = []
    balance: list[dict[str, Any]] = []
    r_errors: list[float] = []
    faulted_tags = {tag for tag, bad in sim.truth.instrument_fault.items() if bad.any()}
    spans = list(windows(YEAR_START, end, site.window, site.timezone))
    for ws, we in spans:
        i0, i1 = np.searchsorted(t_ns, [np.datetime64(ws.replace(tzinfo=None), "ns"),
                                        np.datetime64(we.replace(tzinfo=None), "ns")])
        result = analyze_window(site, _window_frame(site, sim, int(i0), int(i1)), ws, we)
        fits += [f.to_row() for f in result.fits]
        screening.append(result.screening[[c for c in SCREENING_KEEP
                                           if c in result.screening.columns]])
        if result.balance is not None:
            balance.append({k: result.balance[k] for k in BALANCE_KEEP if k in result.balance})
        for f in result.fits:
            r_errors += _r_error(site, sim, f, int(i0), int(i1), faulted_tags)
    journal = alarm_journal(site, sim)
    frozen = [(e.condition.removeprefix("frozen "),
               pd.Timestamp(e.time).ceil(pd.Timedelta(seconds=site.schedule.ingest_every))
               .to_pydatetime())
              for e in journal if e.condition.startswith("frozen") and e.action == "activated"]
    return Analysed(seed, injected, pd.DataFrame(fits), pd.concat(screening, ignore_index=True),
                    pd.DataFrame(balance) if balance else None, r_errors, len(spans),
                    spans[-1][1], frozen, journal, time.process_time() - c0)  # fmt: skip


def analysed_site(seed: int, step_s: float, cache: Path | None) -> Analysed:
    """`analyse_site`, read from / kept in the cache folder when one is given."""
    path = None if cache is None else cache / f"site-{seed}-{step_s:g}s.pickle"
    if path is not None and path.exists():
        with path.open("rb") as fh:
            got: Analysed = pickle.load(fh)
        return got
    out = analyse_site(seed, step_s)
    if path is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
        with path.open("wb") as fh:
            pickle.dump(out, fh)
    return out


def run_site(seed: int, step_s: float, cache: Path | None = None) -> SiteResult:
    """Simulate, analyse and diagnose one site-year."""
    w0, c0 = time.perf_counter(), time.process_time()
    site = site_for(step_s)
    a = analysed_site(seed, step_s, cache)
    findings = diagnose(
        a.history,
        settings=diagnosis_settings(site),
        now=a.end,
        screening=a.screening,
        balance=a.balance,
    )
    res = SiteResult(seed, a.injected, findings, a.r_errors, 0.0, windows=a.windows,
                     history=a.history, frozen_alarms=a.frozen_alarms,
                     alarm_events=a.alarm_events, end=a.end)  # fmt: skip
    _false_findings(site, res, a.end)
    res.wall_s = time.perf_counter() - w0
    res.cpu_s = time.process_time() - c0 + (a.cpu_s if cache is None else 0.0)
    return res


def alarm_journal(site: Site, sim: Simulation) -> list[AlarmEvent]:
    """The near-real-time checks (`monitor.app.alarm_points.alarm_checks`) over the year: low flow
    (`evaluate_low_flow` with `monitor.app.alarm_points.low_flow_settings`) and frozen meter
    (`evaluate_frozen`, ``[analysis] frozen_hold``), as `monitor.app.alarm_watch.evaluate_alarms`
    runs them at each ingest. The checks are incremental over samples (their state
    carries the delays from one ingest to the next), so one call over the year gives the
    journal the ingests would have written, up to the time each ingest happens."""
    hold = FrozenSettings(hold=timedelta(seconds=site.analysis.frozen_hold))
    times = pd.DatetimeIndex(sim.times).tz_localize("UTC")
    now = times[-1].to_pydatetime()
    out: list[AlarmEvent] = []
    for branch, condition, tag, _ in alarm_checks(site):
        if tag not in sim.values:
            continue
        series = pd.Series(sim.values[tag], index=times)
        state = AlarmState(branch=branch, condition=condition)
        if condition == "low_flow":
            _, events = evaluate_low_flow(series, state,
                                          low_flow_settings(site, site.branch(branch)), now)
        else:
            _, events = evaluate_frozen(series, state, hold, now, tag=tag)
        out += events
    return sorted(out, key=lambda e: e.time)


def _r_error(site: Site, sim: Simulation, fit: WindowFit, i0: int, i1: int,
             faulted_tags: set[str]) -> list[float]:
    """|r − r_true| / r_true of a usable fit where r_true is constant in the window."""
    if not fit.counts or not math.isfinite(fit.r):
        return []
    branch = site.branch(fit.branch)
    tags = {branch.flow_tag, *branch.logged_conditions.values(), site.header_pressure_tag}
    if any(tag in faulted_tags and sim.truth.instrument_fault[tag][i0:i1].any()
           for tag in tags if tag):
        return []
    true = sim.truth.resistance_ratio[branch.name][i0:i1]
    if len(true) == 0 or float(np.ptp(true)) > 1e-3:
        return []
    r_true = float(np.mean(true))
    return [abs(fit.r - r_true) / r_true]


def _false_findings(site: Site, res: SiteResult, end: datetime) -> None:
    """Findings where nothing was wrong: clean branches, and faulted ones before onset."""
    onset = {i.branch: i.onset for i in res.injected}
    clean_years = 0.0
    for b in site.branches:
        t = onset.get(b.name)
        clean_years += (((t if t is not None else end) - YEAR_START) / timedelta(days=365))
    res.clean_branch_years = clean_years
    names = {b.name for b in site.branches}
    for f in res.findings:
        before = f.branch in onset and pd.Timestamp(f.detected) < pd.Timestamp(onset[f.branch])
        if (f.branch in names and f.branch not in onset) or before:
            res.false_findings.append(f)


@dataclass
class Outcome:
    found_in_time: bool
    found_ever: bool
    wrong_kind: bool
    delay_h: float


def judge(inj: Injected, res: SiteResult, site: Site) -> Outcome:
    """Was the fault found in time, with the right kind, and how fast? A frozen meter is
    found by the daily diagnosis (instrument finding) or by the ingest-time alarm."""
    findings = res.findings
    onset = pd.Timestamp(inj.onset)
    own = sorted(
        (f for f in findings if f.branch == inj.branch and pd.Timestamp(f.detected) >= onset
         and pd.Timestamp(f.detected) <= pd.Timestamp(inj.horizon) + 3 * DAY),
        key=lambda f: f.detected,
    )
    right = [f for f in own if f.kind == inj.kind]
    wrong = [f for f in own if f.kind in RESISTANCE_KINDS and f.kind != inj.kind]
    first_right = pd.Timestamp(right[0].detected) if right else None
    if inj.kind == "instrument":
        alarms = [pd.Timestamp(t) for tag, t in res.frozen_alarms
                  if tag == inj.tag and onset <= pd.Timestamp(t) <= pd.Timestamp(inj.horizon)]
        if alarms and (first_right is None or min(alarms) < first_right):
            first_right = min(alarms)
    wrong_first = bool(wrong) and (first_right is None
                                   or pd.Timestamp(wrong[0].detected) <= first_right)
    deadline = pd.Timestamp(inj.deadline)  # steps: 24 h after the onset
    found_in_time = first_right is not None and first_right <= deadline
    delay = (first_right - onset).total_seconds() / 3600 if first_right is not None else math.nan
    return Outcome(found_in_time, first_right is not None, wrong_first, delay)


def summarize(results: list[SiteResult], site: Site, step_s: float) -> None:
    outcomes: dict[str, list[Outcome]] = {k: [] for k in GOALS}
    for res in results:
        for inj in res.injected:
            outcomes[inj.kind].append(judge(inj, res, site))
    print(f"\n{len(results)} site-years of the example site ({len(site.branches)} branches), "
          f"samples every {step_s:g} s (1-minute data would be {step_s / 60:g}x the rows), "
          f"daily windows")
    print(f"{'kind':<14}{'faults':>7}{'in time':>9}{'ever':>7}"
          f"{'wrong kind':>11}{'median delay':>14}{'max delay':>11}  goal")
    met: dict[str, bool] = {}
    labels = {
        "restriction": "found within 24 h of the step, >= 95 %",
        "fouling": "found before r passes 1.25, >= 95 %",
        "back_pressure": "right kind within 24 h of the step, >= 90 %",
        "instrument": "frozen meter found within 6 h",
    }
    for kind, rows in outcomes.items():
        n = len(rows)
        in_time = sum(o.found_in_time for o in rows) / n if n else math.nan
        ever = sum(o.found_ever for o in rows) / n if n else math.nan
        wrong = sum(o.wrong_kind for o in rows) / n if n else math.nan
        delays = [o.delay_h for o in rows if o.found_ever]
        med = float(np.median(delays)) if delays else math.nan
        top = float(np.max(delays)) if delays else math.nan
        met[kind] = in_time >= GOALS[kind]
        print(f"{kind:<14}{n:>7}{in_time:>9.0%}{ever:>7.0%}{wrong:>11.0%}"
              f"{med:>12.1f} h{top:>9.1f} h  {labels[kind]}: "
              f"{'met' if met[kind] else 'NOT met'}")
    print("in time: found with the right kind by the goal's time; delay: detected - onset "
          "(a daily window is analysed when it ends; frozen meters also by the ingest-time "
          "alarm)")
    clean = sum(r.clean_branch_years for r in results)
    false = [f for r in results for f in r.false_findings]
    rate = len(false) / clean if clean else math.nan
    by_kind = Counter(f.kind for f in false)
    imbalance = sum(1 for r in results for f in r.findings if f.kind == "imbalance")
    unrelated = [(r.seed, f) for r in results for f in _unrelated(r)]
    print(f"\nfalse findings: {len(false)} over {clean:.1f} clean branch-years = "
          f"{rate:.2f} per clean branch-year ({dict(by_kind)}); goal <= "
          f"{GOAL_FALSE_PER_BRANCH_YEAR}: "
          f"{'met' if rate <= GOAL_FALSE_PER_BRANCH_YEAR else 'NOT met'}")
    splits = spurious = 0
    for r in results:
        h = r.history
        if h is None or "tail_offset_s" not in h.columns:
            continue
        cut = h[np.isfinite(pd.to_numeric(h["tail_offset_s"], errors="coerce"))]
        splits += len(cut)
        for _, w in cut.iterrows():
            stepped = any(i.branch == w["branch"] and i.kind != "fouling"
                          and w["window_start"] <= pd.Timestamp(i.onset) < w["window_end"]
                          for i in r.injected)
            spurious += not stepped
    print(f"windows read as their tail (a step found inside them): {splits}, "
          f"{spurious} of them with no step injected in the window")
    stray = [(r.seed, tag, t) for r in results for tag, t in r.frozen_alarms
             if not any(i.kind == "instrument" and i.tag == tag
                        and pd.Timestamp(i.onset) <= pd.Timestamp(t) <= pd.Timestamp(i.horizon)
                        for i in r.injected)]
    checked = sum(1 for _, c, _, _ in alarm_checks(site) if c.startswith("frozen"))
    print(f"frozen-meter alarms (ingest-time check) on live meters: {len(stray)} over "
          f"{checked * len(results)} tag-years")
    print(f"header imbalance findings: {imbalance} in {len(results)} site-years "
          "(every site-year has a frozen branch meter)")
    print(f"findings on faulted branches detected after their fault's horizon (+3 days), "
          f"of another kind than the fault and not low flow: {len(unrelated)} "
          f"({dict(Counter(f.kind for _, f in unrelated))})")
    errors = [e for r in results for e in r.r_errors]
    med_err = float(np.median(errors)) if errors else math.nan
    p95 = float(np.percentile(errors, 95)) if errors else math.nan
    print(f"median |r - r_true| / r_true: {100 * med_err:.2f} % over {len(errors)} fits "
          f"(95th percentile {100 * p95:.2f} %); goal <= {100 * GOAL_R_ERROR:.0f} %: "
          f"{'met' if med_err <= GOAL_R_ERROR else 'NOT met'}")
    per_key = Counter((r.seed, f.branch, f.kind) for r in results for f in r.findings)
    worst = max(per_key.items(), key=lambda kv: kv[1], default=None)
    open_keys = Counter((r.seed, f.branch, f.kind) for r in results for f in r.findings
                        if f.end is None)
    print(f"findings per site-year: {sum(per_key.values()) / len(results):.1f} "
          f"({dict(Counter(k[2] for k in per_key.elements()))}); most of one (branch, kind): "
          + (f"{worst[1]} ({worst[0][2]} on {worst[0][1]}, seed {worst[0][0]})" if worst
             else "none")
          + f"; most open at once for one (branch, kind): {max(open_keys.values(), default=0)}")
    alarm_load(results)
    misses = [(r.seed, inj, judge(inj, r, site)) for r in results for inj in r.injected]
    misses = [m for m in misses if not m[2].found_in_time]
    if misses:
        print("\nnot found in time:")
        for seed, inj, o in misses:
            res = next(r for r in results if r.seed == seed)
            kinds = sorted({f.kind for f in _near(inj, res)})
            print(f"  seed {seed} {inj.kind:<13} {inj.branch:<14} onset {inj.onset:%Y-%m-%d %H:%M}"
                  f" size {inj.size:+.3g}  delay {o.delay_h:.0f} h  findings near: {kinds}")
    if false:
        print("\nfalse findings:")
        for r in results:
            for f in r.false_findings:
                print(f"  seed {r.seed} {f.branch:<14} {f.kind:<13} detected "
                      f"{pd.Timestamp(f.detected):%Y-%m-%d}  {f.message[:90]}")


#: EEMUA 191 (REFERENCES.md): about one alarm per 10 min per operator is the most that can
#: be handled in steady operation (6 per operator-hour); "a few per week" is what a
#: healthy site should see (DESIGN §3).
EEMUA_MAX_PER_HOUR = 6.0


def alarm_load(results: list[SiteResult]) -> None:
    """The alarm-rate figures (EEMUA 191) of the near-real-time alarms of each site-year,
    one operator per site."""
    print("\nalarm load of the near-real-time checks (EEMUA 191; one operator per site):")
    total = hours = 0.0
    peak = 0
    standing: list[tuple[int, str, str, datetime]] = []
    chatter: list[tuple[int, str, str]] = []
    floods = 0
    by_condition: Counter[str] = Counter()
    for r in results:
        if not r.alarm_events:
            hours += (r.end - YEAR_START) / timedelta(hours=1)
            continue
        s = alarm_rate_summary(r.alarm_events, now=r.end)
        total += s.activations
        hours += (r.end - YEAR_START) / timedelta(hours=1)
        peak = max(peak, s.max_in_10_min)
        floods += len(s.floods)
        standing += [(r.seed, b, c, t) for b, c, t in s.stale]
        chatter += [(r.seed, b, c) for b, c in s.chattering]
        by_condition.update("low flow" if e.condition == "low_flow" else "frozen meter"
                            for e in r.alarm_events if e.action == "activated")
    per_hour = total / hours if hours else math.nan
    print(f"  activations: {total:.0f} over {hours / 8760:.1f} site-years "
          f"({dict(by_condition)}) = {per_hour:.4f} per operator-hour, "
          f"{per_hour * 24 * 7:.2f} per week (ceiling {EEMUA_MAX_PER_HOUR:g} per hour: "
          f"{'met' if per_hour <= EEMUA_MAX_PER_HOUR else 'NOT met'})")
    print(f"  peak in any 10 min: {peak}; floods (> 10 in 10 min): {floods}")
    print(f"  standing alarms (in alarm > 24 h): {len(standing)}"
          + "".join(f"\n    seed {sd} {b} {c} since {t:%Y-%m-%d %H:%M}"
                    for sd, b, c, t in standing))
    print(f"  chattering alarms (3 activations within 1 min): {len(chatter)}"
          + "".join(f"\n    seed {sd} {b} {c}" for sd, b, c in chatter))


def _unrelated(res: SiteResult) -> list[Finding]:
    out = []
    for inj in res.injected:
        late = pd.Timestamp(inj.horizon) + 3 * DAY
        out += [f for f in res.findings if f.branch == inj.branch and f.kind != inj.kind
                and f.kind != "low_flow" and pd.Timestamp(f.detected) > late]
    return out


def _near(inj: Injected, res: SiteResult) -> list[Finding]:
    onset = pd.Timestamp(inj.onset)
    return [f for f in res.findings if f.branch == inj.branch
            and onset - 2 * DAY <= pd.Timestamp(f.detected) <= pd.Timestamp(inj.horizon) + 3 * DAY]


def detail(res: SiteResult) -> None:
    """Fit history and findings of one site-year around each fault (to see why)."""
    assert res.history is not None
    hist = res.history
    cols = ["window_start", "r", "r_low", "r_high", "s_pa", "end_pressure_pa", "samples",
            "status"]
    for inj in res.injected:
        a, b = pd.Timestamp(inj.onset) - 4 * DAY, pd.Timestamp(inj.deadline) + 4 * DAY
        rows = hist[(hist["branch"] == inj.branch) & (hist["window_start"] >= a)
                    & (hist["window_start"] <= b)]
        print(f"\n{inj.kind} on {inj.branch} at {inj.onset:%Y-%m-%d %H:%M}, size {inj.size:+.4g}")
        with pd.option_context("display.width", 160, "display.max_rows", 400):
            print(rows[[c for c in cols if c in rows.columns]].to_string(index=False))
        for f in res.findings:
            if f.branch == inj.branch:
                print(f"  finding {f.kind:<13} start {pd.Timestamp(f.start):%m-%d %H:%M} "
                      f"detected {pd.Timestamp(f.detected):%m-%d %H:%M}  {f.message[:100]}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sites", type=int, default=20, help="site-years [-]")
    parser.add_argument("--seed", type=int, default=1, help="first seed [-]")
    parser.add_argument("--step-s", type=float, default=300.0, help="sample step [s]")
    parser.add_argument("--workers", type=int, default=2, help="processes [-]")
    parser.add_argument("--cache", type=Path, default=None,
                        help="folder keeping each site-year's analysis for the next run")
    parser.add_argument("--detail", action="store_true",
                        help="print each site's fit history around its faults")
    args = parser.parse_args()
    seeds = [args.seed + i for i in range(args.sites)]
    w0, c0 = time.perf_counter(), time.process_time()
    if args.workers > 1:
        with ProcessPoolExecutor(max_workers=args.workers) as pool:
            results = list(pool.map(run_site, seeds, [args.step_s] * len(seeds),
                                    [args.cache] * len(seeds)))
    else:
        results = [run_site(s, args.step_s, args.cache) for s in seeds]
    wall = time.perf_counter() - w0
    if args.detail:
        for res in results:
            detail(res)
    summarize(results, site_for(args.step_s), args.step_s)
    cpu = sum(r.cpu_s for r in results)
    if args.workers > 1:
        cpu += time.process_time() - c0  # the parent's own share
    print(f"\ntime: wall {wall:.0f} s, cpu {cpu:.0f} s over {args.workers} worker(s); "
          f"{cpu / max(1, len(results)):.0f} s cpu per site-year")


if __name__ == "__main__":
    main()
