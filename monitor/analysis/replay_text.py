"""The sentences of the replay's findings, written in one place.

Every message `monitor.analysis.replay` and its detectors put on a finding is built here, from
numbers the detectors computed: dates in the site's time zone, flows in the branch's flow
tag's unit (`monitor.analysis.findings.flow_pair`), pressures in the branch's pressure tag's unit
(`monitor.analysis.findings.BranchSettings.pressure_unit`), said to be gauge unless the unit's
name says gauge or absolute (`adapters.units.pressure_labels`), to the digits that
resolve 1 kPa (`pressure_digits`).
"""

from __future__ import annotations

import math

import pandas as pd

from adapters.units import from_si, pressure_labels
from monitor.analysis.findings import Episodes, flow_pair

__all__ = [
    "back_pressure_changed", "back_pressure_moved", "event_not_checked", "event_not_effective",
    "fouling_forecast", "fouling_levelled", "fouling_rising", "low_flow", "on_day",
    "pressure_digits", "resistance_step", "unlogged_fall",
]  # fmt: skip

#: what a step of r most likely is, by kind of finding
STEP_CAUSES = {
    "restriction": "a restriction (valve throttled or closed, debris)",
    "instrument": "its flow meter (the header mass balance moved with it)",
}


def on_day(t: pd.Timestamp, timezone: str, window_start: pd.Timestamp | None = None) -> str:
    """*t* as the site's date — with the time of day when it is a step inside a window,
    i.e. not that window's start *window_start* — for the messages an engineer reads."""
    local = pd.Timestamp(t).tz_convert(timezone)
    if window_start is not None and pd.Timestamp(t) != window_start:
        return f"{local:%Y-%m-%d %H:%M}"
    return f"{local:%Y-%m-%d}"


# -- back-pressure ---------------------------------------------------------------------
def pressure_digits(unit: str) -> int:
    """Decimals that state pressures in *unit* to 1 kPa = 0.01 bar (a tenth of the
    smallest back-pressure step reported, ``min_bp_step_pa``): 2 in bar, 0 in kPa, 1 in
    psi.

    >>> pressure_digits("bar"), pressure_digits("kPa"), pressure_digits("psig")
    (2, 0, 1)
    """
    kpa = float(from_si(1.0e3, pressure_labels(unit)[1], "pressure"))
    # rounded first: log10 of 0.01 is not exactly -2 in floating point
    return max(0, math.ceil(round(-math.log10(kpa), 9)))


def back_pressure_moved(name: str, delta_pa: float, day: str, before_pa: float,
                        after_pa: float, *, unit: str = "bar") -> str:  # fmt: skip
    """A logged or fitted termination pressure stepped by *delta_pa* [Pa] from *before_pa*
    to *after_pa* [Pa gauge], stated in the pressure tag's *unit*."""
    label, plain = pressure_labels(unit)
    d = pressure_digits(unit)
    step = float(from_si(delta_pa, plain, "pressure"))
    before, after = (float(v) for v in from_si([before_pa, after_pa], unit, "pressure"))
    return (
        f"{name}: the back-pressure at its end moved by {step:+.{d}f} {plain} on {day} "
        f"(from {before:.{d}f} to {after:.{d}f} {label})."
    )


def back_pressure_changed(name: str, offset_pa: float, day: str, r_before: float,
                          r_after: float, *, unit: str = "bar") -> str:  # fmt: skip
    """A step of r that the window reads as a constant offset *offset_pa* [Pa] (NaN:
    size unknown), stated in the pressure tag's *unit*."""
    plain = pressure_labels(unit)[1]
    offset = float(from_si(offset_pa, plain, "pressure"))
    d = pressure_digits(unit)
    size = f" by about {offset:+.{d}f} {plain}" if math.isfinite(offset_pa) else ""
    return (
        f"{name}: the back-pressure at its end changed{size} on {day}; the offset is the "
        f"same at every flow (it reads as r {r_before:.2f} → {r_after:.2f})."
    )


# -- steps of r ------------------------------------------------------------------------
def resistance_step(name: str, kind: str, r_before: float, r_after: float, day: str) -> str:
    """A step of the resistance ratio, for a finding of *kind* (`STEP_CAUSES`)."""
    e = r_after - r_before
    return (
        f"{name}: resistance ratio stepped from {r_before:.2f} to {r_after:.2f} "
        f"({100 * e / r_before:+.0f} %) on {day}; most likely {STEP_CAUSES[kind]}."
    )


# -- fouling ---------------------------------------------------------------------------
def fouling_forecast(limit: float, *, passed: str | None, reached: bool, eta: str | None,
                     low: str | None, high: str | None) -> str:  # fmt: skip
    """Where r stands against its cleaning limit *limit* [-]: passed on day *passed*, at
    it, or reaching it about day *eta* (between *low* and *high*; None: not forecast)."""
    if passed is not None:
        return f"it passed its cleaning limit {limit:.2f} on {passed}"
    if reached:
        return f"it is at the cleaning limit {limit:.2f}"
    if eta is None:
        return "the rate is too uncertain to forecast the cleaning date"
    lo = "now" if low is None else low
    hi = "later" if high is None else high
    return (f"at this rate it reaches the cleaning limit {limit:.2f} about "
            f"{eta} (between {lo} and {hi})")  # fmt: skip


def fouling_rising(name: str, r_ref: float, r_now: float, slope_per_day: float,
                   forecast: str) -> str:  # fmt: skip
    """r still climbing: from *r_ref* to *r_now* at *slope_per_day* [1/d]."""
    return (
        f"{name} is fouling: resistance ratio {r_ref:.2f} → {r_now:.2f}, rising "
        f"{slope_per_day * 30:.3f} per month; {forecast}."
    )


def fouling_levelled(name: str, r_ref: float, level: float, since: str, span_days: float,
                     slope_per_day: float, limit: float, passed: str | None) -> str:  # fmt: skip
    """r raised but no longer rising over the last *span_days* [d]."""
    where = (f"it passed its cleaning limit {limit:.2f} on {passed}"
             if passed is not None else f"below the cleaning limit {limit:.2f}")  # fmt: skip
    return (
        f"{name} has fouled: resistance ratio {r_ref:.2f} → {level:.2f} since {since}, not "
        f"rising over the last {span_days:.0f} days ({slope_per_day * 30:+.3f} per month); "
        f"{where}."
    )


def unlogged_fall(name: str, r_ref: float, r_peak: float, since: str, limit: float,
                  passed: str | None, day: str, r_after: float, date: str) -> str:  # fmt: skip
    """A fouled r fell back on *day* with no maintenance logged; *date* is the day to
    log the cleaning on."""
    passing = (f", passing its cleaning limit {limit:.2f} on {passed}"
               if passed is not None else "")  # fmt: skip
    return (
        f"{name} fouled: resistance ratio {r_ref:.2f} → {r_peak:.2f} from {since}{passing}; "
        f"on {day} it fell back to {r_after:.2f} with no maintenance logged: an unlogged "
        "cleaning (or a removed restriction). Record it with "
        f"`branchwatch log SITE {name} --cleaned {date}`."
    )


# -- maintenance checked against the fits ------------------------------------------------
def event_not_checked(word: str, day: str, fitted: int, needed: int, r_before: float,
                      r_since: float | None) -> str:  # fmt: skip
    """A cleaning or valve setting with too few fits after it to judge yet."""
    after = f", {r_since:.2f} in the {fitted} window(s) since" if r_since is not None else ""
    return (
        f"The {word} logged on {day} is not checked yet ({fitted} of {needed} windows "
        f"after it fitted): r {r_before:.2f} before{after}."
    )


def event_not_effective(word: str, day: str, visible: bool, r_ref: float, r_before: float,
                        r_after: float) -> str:  # fmt: skip
    """A cleaning or valve setting that did not bring r back down (*visible*: it took
    off part of the rise above *r_ref*)."""
    effect = (f"took off only part of the rise (baseline {r_ref:.2f})" if visible
              else "had no visible effect")  # fmt: skip
    return f"The {word} logged on {day} {effect}: r {r_before:.2f} before, {r_after:.2f} after."


# -- low flow --------------------------------------------------------------------------
def low_flow(
    name: str, eps: Episodes, until: pd.Timestamp, *, q_m3s: float, qmin_m3s: float,
    unit: str, timezone: str, deadband: float, day: str, causes: list[str],
) -> str:  # fmt: skip
    """The low-flow sentence, in the flow tag's *unit*, with the digits that show the
    comparison it states; *day* is the window's (site) date, *causes* the other open
    findings of the branch (while the condition lasts)."""
    (q_t, low_t), qmin_t = flow_pair([q_m3s, eps.worst], qmin_m3s, unit)
    more = eps.describe(until, timezone)
    lowest = f"lowest {low_t} {unit}" if len(eps.spans) > 1 or eps.worst != q_m3s else ""
    extra = "; ".join(x for x in (more, lowest) if x)
    extra = f" ({extra})" if extra else ""
    if not eps.active:
        a = on_day(eps.spans[-1][0], timezone)
        b = on_day(eps.last_end, timezone)
        return (f"{name}: mean flow was below its minimum {qmin_t} {unit} from {a} "
                f"to {b}{extra}; above it since.")  # fmt: skip
    cause = f"; likely cause: {', '.join(causes)}" if causes else ""
    if q_m3s < qmin_m3s:
        state = f"below its minimum {qmin_t} {unit}"
    else:
        state = (f"back above its minimum {qmin_t} {unit} but within "
                 f"{100 * deadband:.0f} % of it")  # fmt: skip
    return f"{name}: mean flow {q_t} {unit} on {day}, {state}{extra}{cause}."
