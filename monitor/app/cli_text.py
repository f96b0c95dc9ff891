"""What the ``branchwatch`` command line prints: the records of the jobs and operations
as lines for a person (times in site time) or as JSON-ready objects.
"""

from __future__ import annotations

import sys
from collections.abc import Iterable, Sequence
from datetime import datetime
from pathlib import Path
from typing import Any

import pandas as pd

from adapters.base import ReadingsSource, ResultsStore
from adapters.fit_record import WindowFit
from monitor.site.config import Site

__all__ = [
    "FIT_CSV_COLUMNS",
    "NOTE_HELP",
    "analyze_with_progress",
    "episodes",
    "event_json",
    "local",
    "print_alarm_action",
    "print_alarm_events",
    "print_alarms",
    "print_analysis",
    "print_delivery",
    "print_demo",
    "print_findings",
    "print_ingest",
    "print_log",
    "print_status",
    "watch_json",
    "write_fits_csv",
]


def local(site: Site, when: Any) -> str:
    """A UTC time as the site's local date and time, e.g. '2026-06-10 11:30'."""
    return f"{pd.Timestamp(when).tz_convert(site.timezone):%Y-%m-%d %H:%M}"


def print_findings(site: Site, findings: Sequence[Any]) -> None:
    """Findings as lines, times in site time."""
    for f in findings:
        state = "open" if f.end is None else f"ended {local(site, f.end)}"
        print(f"  {f.branch:<16} {f.kind:<14} since {local(site, f.start)} ({state}, "
              f"confidence {f.confidence:.2f}{episodes(site, f.branch, f.kind, f.evidence)})"
              f": {f.message}")


def episodes(site: Site, branch: str, kind: str, evidence: Any) -> str:
    """", 3 episodes, 12 % of the time, lowest 55.2 m3/h" for a finding that has them; a
    fouled branch past its cleaning limit adds ", priority high"."""
    from monitor.analysis.findings import episode_text

    tag = site.total_flow_tag if kind == "imbalance" else next(
        (b.flow_tag for b in site.branches if b.name == branch), None)
    unit = site.tags[tag].unit if tag is not None and tag in site.tags else "m3/h"
    ev = dict(evidence or {})
    text = episode_text(ev, timezone=site.timezone, flow_unit=unit)
    high = ", priority high" if ev.get("priority") == 3.0 else ""
    return (f", {text}" if text else "") + high


def event_json(site: Site, e: Any) -> dict[str, Any]:
    from monitor.app.alarms import describe_condition

    return {"time": pd.Timestamp(e.time).isoformat(), "site_time": local(site, e.time),
            "branch": e.branch, "condition": e.condition,
            "alarm": describe_condition(e.branch, e.condition), "action": e.action,
            "state": e.state.value, "message": e.message}


def print_alarm_events(site: Site, events: Sequence[Any]) -> None:
    """Alarm events of this evaluation, times in site time."""
    from monitor.app.alarms import describe_condition

    if not events:
        return
    print(f"alarms ({len(events)} changes, site time {site.timezone}):")
    for e in events:
        print(f"  {local(site, e.time)}  {describe_condition(e.branch, e.condition)}: "
              f"{e.action} -> {e.state.value}" + (f"  {e.message}" if e.message else ""))


def print_ingest(summary: Any) -> None:
    print(f"read {summary.read} readings in {summary.batches} batches; stored "
          f"{summary.stored} new, {summary.duplicates} already stored")
    if summary.corrections_applied or summary.corrections_refused:
        print(f"corrected readings: {summary.corrections_applied} applied (their analysed "
              f"windows are fitted again by the next analysis), "
              f"{summary.corrections_refused} refused (first stored value kept); "
              "journalled in the store, see [source] corrections")
    if summary.quarantined:
        print(f"quarantined {summary.quarantined} rows:")
        for reason, count in sorted(summary.quarantine_reasons.items(), key=lambda kv: -kv[1]):
            print(f"  {count:>6}  {reason}")
    for note, count in sorted(summary.notes.items()):
        why = NOTE_HELP.get(note, "")
        print(f"note: {note.replace('_', ' ')}: {count}{' (' + why + ')' if why else ''}")


#: What an ingest note means for the person reading it, where the name alone does not say.
NOTE_HELP = {
    "files_unsettled": "changed in the last [source] settle_seconds: maybe still being "
                       "written, left for the next ingest",
    "unterminated_last_line": "the last line has no line end yet: read when it is finished",
    "unknown_tag_columns": "columns the site file does not name: ignored",
    "unknown_tag_rows": "rows of tags the site file does not name: quarantined once per tag",
    "file_changed": "a file already read changed before its read position: read again whole, "
                    "stored readings kept",
    "duplicate_file": "the same content as a file already read: skipped",
    "out_of_order_rows": "rows earlier than the row before them: stored by their time",
    "duplicate_rows": "the same time and tag twice in one export: the last row kept",
    "files_quarantined": "files that could not be read at all (binary, unreadable, a line "
                         "too long): quarantined with the reason, read again once they change",
    "symlinks_skipped": "symbolic links in the inbox: never followed; copy the export in",
    "nonfinite_values": "NaN or infinite values: quarantined, not stored",
    "long_lines": "lines over the length limit: quarantined, the rest of the file read",
}


def print_log(site: Site, events: pd.DataFrame) -> None:
    if events.empty:
        print("no maintenance recorded")
        return
    print(f"maintenance log (site time, {site.timezone}):")
    print(f"  {'id':>4}  {'time':<16}  {'branch':<16} {'kind':<17} note")
    for row in events.to_dict(orient="records"):
        marks = []
        if not pd.isna(row.get("replaces")):
            marks.append(f"corrects entry {int(row['replaces'])}")
        if not pd.isna(row.get("withdrawn_at")):
            why = f": {row['withdrawn_note']}" if row.get("withdrawn_note") else ""
            marks.append(f"withdrawn {local(site, row['withdrawn_at'])} by "
                         f"{row.get('withdrawn_by') or '?'}{why}")
        state = f"  [{'; '.join(marks)}]" if marks else ""
        print(f"  {int(row['id']):>4}  {local(site, row['time']):<16}  {row['branch']:<16} "
              f"{row['kind']:<17} {row.get('note') or ''}{state}")


def print_alarms(site: Site, listing: Any) -> None:
    print(f"times in site time ({site.timezone})")
    if not listing.alarms:
        print("no alarms" + ("" if listing.all_shown else " standing (all normal)"))
    for a in listing.alarms:
        when = f" since {local(site, a.since)}" if a.since is not None else ""
        print(f"  {a.branch:<16} {a.condition:<14} {a.state:<15}{when}  {a.message}")
    if listing.journal:
        print("\nlatest journal entries:")
        for e in listing.journal:
            print(f"  {local(site, e.time)}  {e.alarm:<36} "
                  f"{e.from_state or '-'} -> {e.to_state}")


def print_status(site: Site, st: Any) -> None:
    """The text of ``status``: a `monitor.app.operations.StatusSummary`."""
    from monitor.app.alarms import format_age

    print(st.site)
    print(f"\nnewest reading per tag (site time, {st.timezone}; stale after "
          f"{format_age(st.stale_after_s)}):")
    if not st.readings_stored:
        print("  none yet: run 'branchwatch ingest'")
    for t in st.tags:
        if t.last is None:
            print(f"  {t.tag:<10} no reading stored  STALE")
            continue
        flag = "  STALE" if t.stale else ""
        print(f"  {t.tag:<10} {local(site, t.last)}  {format_age(t.age_s or 0.0):>12} old{flag}")
    if st.stale_tags:
        print(f"  {len(st.stale_tags)} of {len(st.tags)} tags stale: check the "
              "historian export or database link ('branchwatch alarms' lists the alarms)")
    print("\nlast analysed window per branch:")
    if not st.fits_last:
        print("  none yet: run 'branchwatch analyze'")
    for branch, end in st.fits_last:
        print(f"  {branch:<16} {end:%Y-%m-%d %H:%M}Z")
    print("\nlast job runs:")
    for j in st.jobs:
        status = "did not finish (no end recorded)" if j.unfinished else j.status
        print(f"  {j.started:%Y-%m-%d %H:%M:%S}Z  {j.job:<8} {status}")
    print(f"\nopen findings: {len(st.open_findings)} (times in site time, {st.timezone})")
    for f in st.open_findings:
        more = episodes(site, f.branch, f.kind, f.evidence).removeprefix(", ")
        print(f"  {f.branch:<16} {f.kind:<14} since {local(site, f.start)}"
              f"{f' ({more})' if more else ''}: {f.message}")
    if any(st.corrections.values()):
        c = st.corrections
        print(f"\ncorrected readings: {c['applied']} applied "
              f"({c['pending']} waiting for re-analysis: 'branchwatch analyze' or "
              f"the daily job fits their windows again), {c['refused']} refused "
              "(first stored value kept; [source] corrections)")
    if st.quarantine:
        print("\nquarantined rows by reason: "
              + ", ".join(f"{k} {v}" for k, v in sorted(st.quarantine.items())))
    if st.notify_configured:
        print(f"\nmessages: {st.messages['sent']} sent, {len(st.not_sent)} not sent")
        for m in st.not_sent:
            what = "GIVEN UP" if m.status == "failed" else f"pending, {m.attempts} tries"
            print(f"  {m.channel:<8} {what}: {m.subject}"
                  + (f" ({m.last_error})" if m.last_error else ""))


FIT_CSV_COLUMNS = (
    "branch", "window_start", "window_end", "r", "r_low", "r_high", "samples", "status",
    "s_pa", "identifiable", "flow_min_m3s", "flow_max_m3s", "mean_flow_m3s",
    "residual_std_pa", "temperature_c", "header_pressure_pa", "message",
    "step_at", "r_after_step", "r_after_step_low", "r_after_step_high",
)


def write_fits_csv(fits: Iterable[WindowFit], path: Path) -> None:
    """One row per branch and window; where a step came part-way through a window,
    ``step_at`` says when (UTC) and ``r_after_step`` what the samples after it give."""
    rows = []
    for fit in fits:
        row = fit.to_row()
        step = fit.after_step
        at = pd.Timestamp(fit.window_start) + pd.Timedelta(seconds=step.offset_s) if step else None
        row.update(
            window_start=pd.Timestamp(fit.window_start).isoformat(),
            window_end=pd.Timestamp(fit.window_end).isoformat(),
            step_at="" if at is None else at.floor("s").isoformat(),
            r_after_step=row["tail_r"], r_after_step_low=row["tail_r_low"],
            r_after_step_high=row["tail_r_high"],
        )  # fmt: skip
        rows.append({c: row[c] for c in FIT_CSV_COLUMNS})
    path.parent.mkdir(parents=True, exist_ok=True)
    pd.DataFrame(rows, columns=list(FIT_CSV_COLUMNS)).to_csv(path, index=False)


def analyze_with_progress(
    site: Site, store: ResultsStore, source: ReadingsSource, start: datetime, end: datetime,
    *, quiet: bool, jobs: int,
) -> Any:
    """`monitor.app.jobs.analyze` with a progress bar on stderr, recorded as a job run."""
    from tqdm import tqdm

    from monitor.app.jobs import analyze
    from monitor.app.operations import run_recorded

    # on a terminal the bar redraws itself; into a log file it writes a line each 30 s
    tty = sys.stderr.isatty()
    with tqdm(total=None, unit="window", disable=quiet, file=sys.stderr,
              desc="analysing", mininterval=0.1 if tty else 30.0) as bar:
        def progress(done: int, total: int) -> None:
            bar.total = total
            bar.update(done - bar.n)

        return run_recorded(
            store, "analyze",
            lambda: analyze(site, store, source, start, end, progress=progress, jobs=jobs),
        )


def print_analysis(site: Site, summary: Any, replayed: Sequence[Any] | None) -> None:
    """``analyze``: what a `monitor.app.jobs.AnalyzeSummary` counted, its findings, and the
    alarm changes of the replay (None: no replay asked for)."""
    print(f"{summary.windows} windows, {summary.fits} branch fits ({summary.fits_ok} usable), "
          f"{len(summary.findings)} findings")
    if summary.refitted or summary.corrections:
        print(f"{summary.refitted} analysed windows fitted again for "
              f"{summary.corrections} corrected readings")
    print_findings(site, summary.findings)
    if replayed is not None:
        if not replayed:
            print("alarm replay: no alarm changed over the period")
        print_alarm_events(site, replayed)


def print_demo(site: Site, result: Any, files: Any, paths: Any) -> None:
    """``demo``'s closing lines: the analysis (a `monitor.app.jobs.AnalyzeSummary`), its
    findings, and the files (`monitor.app.demo_run.DemoReports`, `monitor.app.demo.DemoPaths`)."""
    folder = paths.folder
    print(f"\n{result.windows} days analysed, {result.fits_ok} of {result.fits} branch fits "
          f"usable, {len(result.findings)} findings:")
    print_findings(site, result.findings)
    print(f"\nfiles in {folder}:")
    for name in ("site.toml", "findings.json", "fits.csv", "system-curve.png"):
        print(f"  {name}")
    print(f"  {files.report.relative_to(folder)}   <- the morning report: open it in a browser")
    print(f"  {files.monthly.relative_to(folder)}   <- the long view of the last whole month")
    print(f"\ntry: branchwatch status {paths.site_file}")


def watch_json(site: Site, watch: Any) -> dict[str, Any]:
    """``ingest --json``: the summary of a `monitor.app.alarm_watch.WatchPass`, its error and the
    alarm changes it made."""
    summary = watch.summary
    return {**(summary.to_json_dict() if summary is not None else {}),
            "error": None if watch.error is None else str(watch.error),
            "alarm_events": [event_json(site, e) for e in watch.events]}


def print_alarm_action(done: Any) -> None:
    """What a `monitor.app.operations.AlarmActionResult` changed, refused, or that it had
    nothing to do."""
    for c in done.changes:
        print(f"{done.branch} {c.condition}: {c.from_state.value} -> {c.to_state.value}")
    for r in done.refusals:
        print(f"{done.branch} {r.condition}: not reset: {r.reason}")
    if not done.changes and not done.refusals:
        print(f"{done.branch}: nothing to do")


def print_delivery(done: Any, notifiers: Sequence[Any], *, waiting: pd.DataFrame,
                   failed: pd.DataFrame) -> None:
    """``notify``: what was sent, the channels, and the messages still waiting or given up."""
    print(f"sent {done.sent}; {done.retrying} to be tried again, {done.failed} given up now")
    for n in notifiers:
        print(f"  channel {n.name}: {n.describe()}")
    for frame, what in ((waiting, "waiting"), (failed, "given up")):
        for r in frame.itertuples():
            print(f"  {what}: {r.channel!s} {r.subject!s}"
                  + (f" ({r.last_error!s})" if r.last_error else ""))
