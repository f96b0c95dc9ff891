"""The ``branchwatch`` command line.

Each verb is a thin layer: parse arguments, call the job or model function, print a
readable table (or JSON with ``--json``). Errors a user can fix — a bad config, an
unreachable database, an impossible what-if — print one line naming the cause and exit
with status 2; a bug still shows its traceback.
"""

from __future__ import annotations

import argparse
import io
import json
import logging
import os
import sys
import threading
from collections.abc import Callable, Sequence
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pandas as pd

from adapters.base import (
    BranchwatchAdapterError,
    ReadingsSource,
    ResultsStore,
    open_store,
)
from adapters.credentials import MaskingFormatter, mask_secrets
from adapters.units import UnitError, parse_quantity
from monitor.config import ConfigError, Site, load_site

log = logging.getLogger(__name__)

EXIT_OK = 0
EXIT_USAGE = 2

_DESCRIPTION = """\
branchwatch watches the branches of a cooling-water (or any liquid) supply header.
It fits each branch's hydraulic resistance from logged header pressure and branch
flows, tracks it over months, tells fouling from a throttled valve, a back-pressure
change or a faulty meter, raises low-flow alarms, and writes a morning report.

It advises; it does not control. Decisions on isolation, cleaning and set points follow
your site's procedures and the judgement of qualified people.
"""

_EPILOG = """\
typical first steps:
  branchwatch demo                               build a demo site and show everything
  branchwatch check  config/example-site.toml    validate a site file, reach its data
  branchwatch curve  config/example-site.toml    predicted flows at the pump operating point
  branchwatch curve  config/example-site.toml --speed 85 --plot curve.png

Run 'branchwatch VERB --help' for each verb's options.
"""


class UserError(Exception):
    """An error the user can fix; printed as one line, exit status 2."""


#: Files the command creates (store, reports, heartbeat, findings and fits files) are
#: readable by the service user and its group only: no access for other users.
FILE_UMASK = 0o027


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``branchwatch`` console script.

    Sets the umask to `FILE_UMASK` while the verb runs (restored on return). Every log
    line and error message is masked (`adapters.credentials.mask_secrets`). A reader that
    stops reading (``branchwatch status SITE | head -1``) ends the command quietly.
    """
    parser = _parser()
    args = parser.parse_args(argv)
    handler = logging.StreamHandler()
    handler.setFormatter(MaskingFormatter("%(asctime)s %(levelname)-7s %(name)s: %(message)s"))
    logging.basicConfig(
        level=logging.DEBUG if args.verbose else logging.INFO if args.log else logging.WARNING,
        handlers=[handler],
    )
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USAGE
    old_umask = os.umask(FILE_UMASK)
    try:
        code = int(args.func(args) or EXIT_OK)
        sys.stdout.flush()  # a closed pipe shows here, not at interpreter exit
        return code
    except BrokenPipeError:
        _discard_stdout()
        return EXIT_OK
    except (UserError, ConfigError, UnitError, BranchwatchAdapterError) as exc:
        print(f"branchwatch {args.verb}: error: {_error_text(exc, args)}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(f"branchwatch {args.verb}: interrupted; what was stored is kept", file=sys.stderr)
        return 130
    finally:
        os.umask(old_umask)


def _error_text(exc: Exception, args: argparse.Namespace) -> str:
    """The message of a user-fixable error, masked; one line (a config file with several
    mistakes gives one line for each). An adapter error that names a site-file setting
    gets the file in front, as config errors have it."""
    text = str(exc).strip()
    if not isinstance(exc, ConfigError):
        lines = text.splitlines() or [type(exc).__name__]
        if len(lines) > 1:
            log.debug("full error text: %s", text)
        text = lines[0]
        setting = getattr(exc, "setting", None)
        config = getattr(args, "config", None)
        if setting and config is not None and not text.startswith(str(config)):
            text = f"{config}: {text}"
    return mask_secrets(text)


def _discard_stdout() -> None:
    """Point stdout at /dev/null so that the interpreter's last flush cannot fail."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        try:
            os.dup2(devnull, sys.stdout.fileno())
        finally:
            os.close(devnull)
    except (OSError, ValueError, AttributeError):  # stdout is not a file (embedded use)
        sys.stdout = io.StringIO()


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="branchwatch",
        description=_DESCRIPTION,
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("-v", "--verbose", action="store_true", help="debug logging")
    parser.add_argument("--log", action="store_true", help="informational logging")
    verbs = parser.add_subparsers(dest="verb", metavar="VERB")
    for register in _VERBS:
        register(verbs)
    return parser


def _add_verb(
    verbs: Any, name: str, func: Callable[[argparse.Namespace], int | None], summary: str,
    description: str, *, config: bool = True,
) -> argparse.ArgumentParser:
    p: argparse.ArgumentParser = verbs.add_parser(
        name, help=summary, description=description,
        epilog="examples:\n" + "\n".join(f"  {line}" for line in EXAMPLES[name]),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    if config:
        p.add_argument("config", metavar="CONFIG", type=Path, help="site file (TOML)")
    p.set_defaults(func=func)
    return p


#: The example command lines each verb's --help ends with (a test parses every one).
EXAMPLES: dict[str, tuple[str, ...]] = {
    "demo": (
        "branchwatch demo",
        "branchwatch demo --folder /tmp/bw-demo --days 60 --quiet",
    ),
    "check": ("branchwatch check site.toml",),
    "curve": (
        "branchwatch curve site.toml",
        "branchwatch curve site.toml --speed 80 --plot curve.png",
        'branchwatch curve site.toml --header-pressure "3.2 bar" --json',
    ),
    "ingest": (
        "branchwatch ingest site.toml",
        "branchwatch ingest site.toml --json",
    ),
    "analyze": (
        "branchwatch analyze site.toml --from 2026-04-01 --to 2026-09-01 --findings findings.json",
        "branchwatch analyze site.toml --from 2026-08-01 --to 2026-08-02 --fits fits.csv",
        "branchwatch analyze site.toml --from 2025-09-01 --to 2026-09-01 --jobs 2   # a year",
    ),
    "log": (
        'branchwatch log site.toml B1-reactor --cleaned 2026-08-14 --note "hydro-jetted E-110"',
        'branchwatch log site.toml --correct 12 --time "2026-08-14 15:30"',
        'branchwatch log site.toml --withdraw 13 --note "logged on the wrong branch"',
    ),
    "notify": (
        "branchwatch notify site.toml --test",
        "branchwatch notify site.toml",
    ),
    "status": (
        "branchwatch status site.toml",
        "branchwatch status site.toml --json",
    ),
    "alarms": (
        "branchwatch alarms site.toml",
        'branchwatch alarms site.toml --ack B3-quench --by "J. Ortega"',
        'branchwatch alarms site.toml --shelve B5-spray --until "2026-09-01 06:00" --by shift-B',
    ),
    "report": (
        "branchwatch report site.toml",
        "branchwatch report site.toml --date 2026-08-14",
        "branchwatch report site.toml --month 2026-08",
    ),
    "run": (
        "branchwatch run site.toml",
        "branchwatch run site.toml --for 600 --health-file /tmp/bw-health.json   # a trial",
    ),
}


def _site(args: argparse.Namespace) -> Site:
    """The validated site of the verb's CONFIG argument (`ConfigError` names file and key)."""
    return load_site(args.config)


# ---------------------------------------------------------------------------------------
# curve


def _register_curve(verbs: Any) -> None:
    p = _add_verb(
        verbs, "curve", _cmd_curve, "system curve, pump operating point and branch split",
        """\
Predict, from the site file alone, where the pumps and the branches settle: the header
pressure, the total flow, and each branch's flow, velocity, share and threshold pressure
(the header pressure below which that branch gets no flow). A what-if tool: change the
pump speed, fix the header pressure, or change the water temperature.

Logged conditions (tank levels, return-header pressure, valve positions) take the
'nominal' values of their tags in the site file.""",
    )
    p.add_argument("--speed", metavar="PCT", type=float,
                   help="pump speed in %% of design (affinity laws); default: design speed")
    p.add_argument("--header-pressure", metavar="P",
                   help='fix the header pressure instead of solving with the pump, e.g. "3 bar"')
    p.add_argument("--temperature", metavar="T",
                   help='water temperature, e.g. "30 degC"; default: the design temperature')
    p.add_argument("--plot", metavar="FILE", type=Path, help="write a PNG of the curves")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")


def _cmd_curve(args: argparse.Namespace) -> int:
    from monitor.whatif import CurveRequest, solve_curve

    site = _site(args)
    request = CurveRequest(
        speed_ratio=None if args.speed is None else args.speed / 100.0,
        header_pressure_pa=None if args.header_pressure is None
        else parse_quantity(args.header_pressure, "Pa"),
        temperature_c=None if args.temperature is None
        else parse_quantity(args.temperature, "degC"),
    )
    result = solve_curve(site, request)
    if not result.ok:
        raise UserError(result.message)
    if args.plot:
        from monitor.plots import plot_system_curve

        plot_system_curve(site, result, args.plot)
    if args.json:
        print(json.dumps(result.to_json_dict(), indent=2))
    else:
        print(result.table())
        if args.plot:
            print(f"\nplot written to {args.plot}")
    return EXIT_OK


# ---------------------------------------------------------------------------------------
# shared plumbing


def _open(site: Site) -> tuple[ResultsStore, ReadingsSource]:
    """The site's store and readings source; bad [source] settings (an unset url_env, a
    secrets file that is missing, unreadable, open to others or holds no URL, a missing
    driver) become one `UserError` line naming the file and key."""
    from monitor.jobs import open_source

    store = open_store(site.store_url)
    try:
        source = open_source(site)
    except (ValueError, ImportError) as exc:
        store.close()
        if isinstance(exc, BranchwatchAdapterError):
            raise
        text = str(exc)
        if not text.startswith(str(site.path)):
            key, sep, _ = text.partition(": ")
            in_source = sep and key.replace("_", "").isalnum()
            text = f"{site.path}: source{'.' if in_source else ': '}{text}"
        raise UserError(text) from None
    except Exception:
        store.close()
        raise
    return store, source


def _parse_time(text: str, site: Site, what: str) -> datetime:
    """A date or ISO time from the command line; naive means the site's local time."""
    try:
        ts = pd.Timestamp(text)
    except (ValueError, TypeError):
        raise UserError(f"{what} {text!r} is not a date or ISO time (e.g. 2026-05-01)") from None
    if ts.tzinfo is None:
        ts = ts.tz_localize(site.timezone, nonexistent="raise", ambiguous="raise")
    return ts.tz_convert("UTC").to_pydatetime()


def _run_recorded(store: ResultsStore, job: str, func: Callable[[], Any]) -> Any:
    """Run *func*, recording the run (and its failure) in the store's job log."""
    started = datetime.now(UTC)
    store.record_job_run(job, started, None, "running")
    try:
        result = func()
    except BaseException as exc:
        store.record_job_run(job, started, datetime.now(UTC), "failed",
                             {"error": f"{type(exc).__name__}: {exc}"})
        raise
    detail = result.to_json_dict() if hasattr(result, "to_json_dict") else {}
    store.record_job_run(job, started, datetime.now(UTC), "ok", _jsonable(detail))
    return result


def _local(site: Site, when: Any) -> str:
    """A UTC time as the site's local date and time, e.g. '2026-06-10 11:30'."""
    return f"{pd.Timestamp(when).tz_convert(site.timezone):%Y-%m-%d %H:%M}"


def _print_findings(site: Site, findings: Sequence[Any]) -> None:
    """Findings as lines, times in site time."""
    for f in findings:
        state = "open" if f.end is None else f"ended {_local(site, f.end)}"
        print(f"  {f.branch:<16} {f.kind:<14} since {_local(site, f.start)} ({state}, "
              f"confidence {f.confidence:.2f}{_episodes(site, f.branch, f.kind, f.evidence)})"
              f": {f.message}")


def _episodes(site: Site, branch: str, kind: str, evidence: Any) -> str:
    """", 3 episodes, 12 % of the time, lowest 55.2 m3/h" for a finding that has them; a
    fouled branch past its cleaning limit adds ", priority high"."""
    from monitor.findings import episode_text

    tag = site.total_flow_tag if kind == "imbalance" else next(
        (b.flow_tag for b in site.branches if b.name == branch), None)
    unit = site.tags[tag].unit if tag is not None and tag in site.tags else "m3/h"
    ev = dict(evidence or {})
    text = episode_text(ev, timezone=site.timezone, flow_unit=unit)
    high = ", priority high" if ev.get("priority") == 3.0 else ""
    return (f", {text}" if text else "") + high


def _jsonable(value: Any) -> Any:
    return json.loads(json.dumps(value, default=str))


# ---------------------------------------------------------------------------------------
# check


def _register_check(verbs: Any) -> None:
    _add_verb(
        verbs, "check", _cmd_check, "validate a site file and reach its data source and store",
        """\
Validate the site file (every key, unit and tag), build each branch's model, open the
results store (creating or upgrading its tables), and reach the readings source. Prints
what it found; exits 2 when anything is wrong, naming what to fix.""",
    )


def _cmd_check(args: argparse.Namespace) -> int:
    site = _site(args)
    print(f"site file ok: {site.name} ({len(site.branches)} branches, {len(site.tags)} tags)")
    problems: list[str] = []
    try:
        store, source = _open(site)
    except (BranchwatchAdapterError, ImportError, ValueError, KeyError) as exc:
        raise UserError(str(exc)) from None
    try:
        print(f"results store ok: {mask_secrets(site.store_url)}")
        problems = source.check()
        print(f"readings source {source.name}: " + ("ok" if not problems else "PROBLEMS"))
        for p in problems:
            print(f"  - {p}")
    finally:
        source.close()
        store.close()
    from monitor.notifications import build_notifiers

    try:
        channels = build_notifiers(site)
    except ValueError as exc:
        raise UserError(str(exc)) from None
    for n in channels:  # reaching them sends a message: 'notify --test' does that
        print(f"notify channel {n.name}: {n.describe()} ('branchwatch notify CONFIG --test' "
              "sends a test message)")
    if site.notify is None:
        print("notify: no [notify] section; alarms are only stored and shown")
    return EXIT_USAGE if problems else EXIT_OK


# ---------------------------------------------------------------------------------------
# ingest


def _register_ingest(verbs: Any) -> None:
    p = _add_verb(
        verbs, "ingest", _cmd_ingest, "read new readings from the source into the store",
        """\
One ingest pass: every export file (or database row) the store has not seen yet is read,
converted to SI, and stored. Bad rows are quarantined with file, line and reason and never
stop the pass. Running it twice stores nothing new; a pass killed part-way resumes where
the last stored batch ended. Then the alarms are evaluated (low flow, frozen meter, stale
data; see 'branchwatch alarms --help') — also when the ingest failed, so a source that
has stopped delivering raises its stale-data alarm.""",
    )
    p.add_argument("--json", action="store_true", help="print the summary as JSON")


def _cmd_ingest(args: argparse.Namespace) -> int:
    from monitor.jobs import ingest, ingest_and_watch

    site = _site(args)
    store, source = _open(site)
    try:
        watch = ingest_and_watch(site, store, source, run_ingest=lambda: _run_recorded(
            store, "ingest", lambda: ingest(site, store, source)))
    finally:
        source.close()
        store.close()
    summary = watch.summary
    if args.json:
        print(json.dumps({**(summary.to_json_dict() if summary is not None else {}),
                          "error": None if watch.error is None else str(watch.error),
                          "alarm_events": [_event_json(site, e) for e in watch.events]},
                         indent=2, default=str))
    else:
        if summary is not None:
            _print_ingest(summary)
        _print_alarm_events(site, watch.events)
    if watch.error is not None:
        raise watch.error  # one line for a user's error (main), a traceback for a bug
    return EXIT_OK


def _event_json(site: Site, e: Any) -> dict[str, Any]:
    from monitor.alarms import describe_condition

    return {"time": pd.Timestamp(e.time).isoformat(), "site_time": _local(site, e.time),
            "branch": e.branch, "condition": e.condition,
            "alarm": describe_condition(e.branch, e.condition), "action": e.action,
            "state": e.state.value, "message": e.message}


def _print_alarm_events(site: Site, events: Sequence[Any]) -> None:
    """Alarm events of this evaluation, times in site time."""
    from monitor.alarms import describe_condition

    if not events:
        return
    print(f"alarms ({len(events)} changes, site time {site.timezone}):")
    for e in events:
        print(f"  {_local(site, e.time)}  {describe_condition(e.branch, e.condition)}: "
              f"{e.action} -> {e.state.value}" + (f"  {e.message}" if e.message else ""))


def _print_ingest(summary: Any) -> None:
    print(f"read {summary.read} readings in {summary.batches} batches; stored "
          f"{summary.stored} new, {summary.duplicates} already stored")
    if summary.quarantined:
        print(f"quarantined {summary.quarantined} rows:")
        for reason, count in sorted(summary.quarantine_reasons.items(), key=lambda kv: -kv[1]):
            print(f"  {count:>6}  {reason}")
    for note, count in sorted(summary.notes.items()):
        why = _NOTE_HELP.get(note, "")
        print(f"note: {note.replace('_', ' ')}: {count}{' (' + why + ')' if why else ''}")


#: What an ingest note means for the person reading it, where the name alone does not say.
_NOTE_HELP = {
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


# ---------------------------------------------------------------------------------------
# analyze


def _register_analyze(verbs: Any) -> None:
    p = _add_verb(
        verbs, "analyze", _cmd_analyze, "fit and diagnose a period (backfill)",
        """\
Fit every branch's resistance ratio over each analysis window in the period, store the
fits, then diagnose the whole stored history: fouling, restriction, back-pressure change,
low flow, instrument faults, header imbalance. Dates without a zone are site time.""",
    )
    p.add_argument("--from", dest="start", required=True, metavar="DATE", help="first day")
    p.add_argument("--to", dest="end", required=True, metavar="DATE",
                   help="end of the period (exclusive)")
    p.add_argument("--findings", metavar="FILE", type=Path, help="write findings as JSON")
    p.add_argument("--fits", metavar="FILE", type=Path,
                   help="write the fits as CSV: one row per branch and window, r with its "
                   "95 %% interval; step_at and r_after_step where a step came part-way "
                   "through the window")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument(
        "--alarms", action="store_true",
        help="also judge the low-flow, frozen-meter, back-flow and flow-drop alarms over "
        "the period, as the ingest checks would have (the live checks look back only 24 h): for "
        "files of a past period read late. Each alarm change is journalled at its own "
        "historic time; stale-data alarms are not replayed",
    )
    p.add_argument(
        "--jobs", type=_positive_int, default=default_jobs(), metavar="N",
        help=f"""analyse N windows at a time, each in a worker process with its own
        database connection (default {default_jobs()}: this machine's cores, at most
        {MAX_DEFAULT_JOBS}). Workers take a few seconds to start: they are used only
        when the first window shows that the rest would take several times that here
        (a long backfill, a large site). This process writes the results in window
        order: a long backfill stopped part-way (Ctrl-C) keeps every window before the
        stop, and the daemon (or 'analyze --from' the next window) goes on from there.
        Each worker holds one window's readings in memory: lower N on a small machine
        or for a very large site; --jobs 1 does everything in this process.""",
    )


#: The default of ``analyze --jobs`` never exceeds this many processes: reading from one
#: database, more workers mostly queue on it.
MAX_DEFAULT_JOBS = 4


def default_jobs() -> int:
    """Worker processes for a backfill: the usable cores, at most `MAX_DEFAULT_JOBS`."""
    return max(1, min(len(os.sched_getaffinity(0)), MAX_DEFAULT_JOBS))


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be 1 or more, got {value}")
    return value


def _cmd_analyze(args: argparse.Namespace) -> int:


    site = _site(args)
    start = _parse_time(args.start, site, "--from")
    end = _parse_time(args.end, site, "--to")
    if end <= start:
        raise UserError("--to must be after --from")
    store, source = _open(site)
    try:
        summary = _analyze_with_progress(site, store, source, start, end, quiet=args.quiet,
                                         jobs=args.jobs)
        if args.fits:
            from monitor.jobs import current_fits

            _write_fits_csv(current_fits(site, store.read_fits(start=start, end=end)),
                            args.fits)
        replayed = None
        if args.alarms:
            from monitor.jobs import replay_alarms

            replayed = replay_alarms(site, store, source, start, end)
    finally:
        source.close()
        store.close()
    print(f"{summary.windows} windows, {summary.fits} branch fits ({summary.fits_ok} usable), "
          f"{len(summary.findings)} findings")
    _print_findings(site, summary.findings)
    if replayed is not None:
        if not replayed:
            print("alarm replay: no alarm changed over the period")
        _print_alarm_events(site, replayed)
    if args.findings:
        args.findings.parent.mkdir(parents=True, exist_ok=True)
        args.findings.write_text(
            json.dumps([f.to_json_dict() for f in summary.findings], indent=2)
        )
        print(f"findings written to {args.findings}")
    if args.fits:
        print(f"fits written to {args.fits}")
    return EXIT_OK


_FIT_CSV_COLUMNS = (
    "branch", "window_start", "window_end", "r", "r_low", "r_high", "samples", "status",
    "s_pa", "identifiable", "flow_min_m3s", "flow_max_m3s", "mean_flow_m3s",
    "residual_std_pa", "temperature_c", "header_pressure_pa", "message",
    "step_at", "r_after_step", "r_after_step_low", "r_after_step_high",
)


def _write_fits_csv(fits: pd.DataFrame, path: Path) -> None:
    """One row per branch and window; where a step came part-way through a window,
    ``step_at`` says when (UTC) and ``r_after_step`` what the samples after it give."""
    fits = fits.copy()
    if "tail_offset_s" in fits.columns:
        offset = pd.to_numeric(fits["tail_offset_s"], errors="coerce")
        at = fits["window_start"] + pd.to_timedelta(offset, unit="s")
        fits["step_at"] = [t.floor("s").isoformat() if pd.notna(t) else "" for t in at]
        for src, dst in (("tail_r", "r_after_step"), ("tail_r_low", "r_after_step_low"),
                         ("tail_r_high", "r_after_step_high")):
            if src in fits.columns:
                fits[dst] = fits[src]
    cols = [c for c in _FIT_CSV_COLUMNS if c in fits.columns]
    out = fits[cols].copy()
    for c in ("window_start", "window_end"):
        out[c] = out[c].map(lambda t: t.isoformat())
    path.parent.mkdir(parents=True, exist_ok=True)
    out.to_csv(path, index=False)


# ---------------------------------------------------------------------------------------
# log (maintenance)


_EVENT_KINDS = ("cleaned", "valve_set", "meter_calibrated", "other")


def _register_log(verbs: Any) -> None:
    p = _add_verb(
        verbs, "log", _cmd_log, "record, correct or withdraw maintenance on a branch",
        """\
Record a maintenance entry, or correct or withdraw one. The diagnosis checks each entry
against the fits after it: a cleaning that brought the resistance ratio back down ends
the branch's fouling and restriction findings and starts a new baseline; one that did
not keeps the finding open and says so. A valve setting is checked the same way against
a restriction, and ends back-pressure findings; a meter calibration ends instrument
findings. Times without a zone are site time; work dated in the future is refused.
Without an entry to record, lists the log with each entry's id. A withdrawn entry stays
in the log (marked, with who and when) and the diagnosis no longer reads it; a
correction withdraws the old entry and records the corrected one.""",
    )
    p.add_argument("branch", nargs="?", help="branch name (omit to list the log)")
    group = p.add_mutually_exclusive_group()
    group.add_argument("--cleaned", metavar="TIME", help="the branch was cleaned")
    group.add_argument("--valve-set", metavar="TIME", help="a valve on it was (re)set")
    group.add_argument("--meter-calibrated", metavar="TIME", help="its meter was calibrated")
    group.add_argument("--other", metavar="TIME", help="any other work (new baseline)")
    group.add_argument("--withdraw", metavar="ID", type=_positive_int,
                       help="withdraw entry ID (logged in error); it stays in the log, marked")
    group.add_argument("--correct", metavar="ID", type=_positive_int,
                       help="correct entry ID: give the right --time and/or --note")
    p.add_argument("--time", metavar="TIME", help="with --correct: the corrected time")
    p.add_argument("--note", default=None,
                   help="free text kept with the entry (with --withdraw: why)")
    p.add_argument("--by", default=None,
                   help="who withdraws or corrects (default: your login name)")
    p.add_argument("--all", action="store_true", help="list withdrawn entries too")


def _who(args: argparse.Namespace) -> str:
    if args.by:
        return str(args.by)
    import getpass

    try:
        return getpass.getuser() or "unknown"
    except (OSError, KeyError):
        return "unknown"


def _not_future(when: datetime, what: str, site: Site) -> None:
    now = datetime.now(UTC)
    if when > now + timedelta(minutes=5):
        raise UserError(f"{what} {_local(site, when)} ({site.timezone}) is in the future; "
                        "log maintenance once it is done")


def _cmd_log(args: argparse.Namespace) -> int:
    site = _site(args)
    given = {k: getattr(args, k) for k in _EVENT_KINDS if getattr(args, k)}
    if args.time is not None and args.correct is None:
        raise UserError("--time goes with --correct ID; to record new work give "
                        "BRANCH --cleaned TIME (or another kind)")
    if args.correct is not None and args.time is None and args.note is None:
        raise UserError(f"--correct {args.correct} needs the corrected --time and/or --note")
    if given and args.branch is None:
        raise UserError("name the branch the work was done on, e.g. "
                        f"'branchwatch log {args.config} BRANCH --cleaned 2026-08-14'")
    store = open_store(site.store_url)
    try:
        if args.withdraw is not None:
            store.withdraw_maintenance(args.withdraw, by=_who(args), note=args.note or "")
            print(f"withdrawn: entry {args.withdraw} (kept in the log, no longer in force)")
        elif args.correct is not None:
            when = None if args.time is None else _parse_time(args.time, site, "--time")
            if when is not None:
                _not_future(when, "--time", site)
            new_id = store.correct_maintenance(args.correct, time=when, note=args.note,
                                               by=_who(args))
            print(f"corrected: entry {args.correct} withdrawn, replaced by entry {new_id}")
        elif not given:
            _print_log(site, store.maintenance(args.branch, include_withdrawn=args.all))
        else:
            site.branch(args.branch)  # unknown names are refused with the list of branches
            kind, text = next(iter(given.items()))
            when = _parse_time(text, site, f"--{kind.replace('_', '-')}")
            _not_future(when, f"--{kind.replace('_', '-')}", site)
            entry = store.add_maintenance(args.branch, kind, when, args.note or "")
            print(f"recorded: entry {entry}, {args.branch} {kind.replace('_', ' ')} at "
                  f"{_local(site, when)} ({site.timezone})")
    except KeyError as exc:
        raise UserError(str(exc).strip('"')) from None
    except ValueError as exc:  # the store refuses: unknown id, already withdrawn, future
        raise UserError(str(exc)) from None
    finally:
        store.close()
    return EXIT_OK


def _print_log(site: Site, events: pd.DataFrame) -> None:
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
            marks.append(f"withdrawn {_local(site, row['withdrawn_at'])} by "
                         f"{row.get('withdrawn_by') or '?'}{why}")
        state = f"  [{'; '.join(marks)}]" if marks else ""
        print(f"  {int(row['id']):>4}  {_local(site, row['time']):<16}  {row['branch']:<16} "
              f"{row['kind']:<17} {row.get('note') or ''}{state}")


# ---------------------------------------------------------------------------------------
# status


def _register_status(verbs: Any) -> None:
    p = _add_verb(
        verbs, "status", _cmd_status, "last runs, watermarks and data health",
        "How far ingest and analysis have got, the last job runs, and open findings.",
    )
    p.add_argument("--json", action="store_true", help="print JSON")


def _cmd_status(args: argparse.Namespace) -> int:
    from monitor.alarms import format_age
    from monitor.jobs import stale_after

    site = _site(args)
    store = open_store(site.store_url)
    try:
        marks = store.watermarks()
        runs = store.job_runs(limit=10)
        findings = store.read_findings()
        quarantine = store.quarantine_counts()
        outbox = store.outbox()
    finally:
        store.close()
    open_findings = findings[findings["end"].isna()] if not findings.empty else findings
    now = datetime.now(UTC)
    undelivered = outbox[outbox["status"] != "sent"] if not outbox.empty else outbox
    limit_s = stale_after(site)
    newest = {str(t): pd.Timestamp(v) for t, v in
              zip(marks.readings["tag"], marks.readings["last"], strict=True)}
    ages = {t: (now - v.to_pydatetime()).total_seconds() for t, v in newest.items()}
    stale = sorted([t for t, a in ages.items() if a > limit_s]
                   + [t for t in site.tags if t not in newest])
    if args.json:
        print(json.dumps({
            "site": site.name,
            "readings_last": _iso_map(marks.readings, "tag", "last"),
            "readings_age_s": {t: round(a, 1) for t, a in ages.items()},
            "stale_after_s": limit_s,
            "stale_tags": stale,
            "fits_last": _iso_map(marks.fits, "branch", "last_window_end"),
            "jobs": _jsonable(runs.to_dict(orient="records")),
            "open_findings": len(open_findings),
            "quarantine": quarantine,
            "messages": {st: int((outbox["status"] == st).sum()) if not outbox.empty else 0
                         for st in ("pending", "sent", "failed")},
            "messages_not_sent": _jsonable(undelivered[
                ["key", "channel", "subject", "status", "attempts", "last_error"]
            ].to_dict(orient="records")) if not undelivered.empty else [],
        }, indent=2, default=str))
        return EXIT_OK
    print(site.name)
    print(f"\nnewest reading per tag (site time, {site.timezone}; stale after "
          f"{format_age(limit_s)}):")
    if marks.readings.empty:
        print("  none yet: run 'branchwatch ingest'")
    for tag in sorted(set(site.tags) | set(newest)):
        if tag not in newest:
            print(f"  {tag:<10} no reading stored  STALE")
            continue
        flag = "  STALE" if tag in stale else ""
        print(f"  {tag:<10} {_local(site, newest[tag])}  {format_age(ages[tag]):>12} old{flag}")
    if stale:
        print(f"  {len(stale)} of {len(set(site.tags) | set(newest))} tags stale: check the "
              "historian export or database link ('branchwatch alarms' lists the alarms)")
    print("\nlast analysed window per branch:")
    if marks.fits.empty:
        print("  none yet: run 'branchwatch analyze'")
    for r in marks.fits.itertuples():
        print(f"  {r.branch:<16} {r.last_window_end:%Y-%m-%d %H:%M}Z")
    print("\nlast job runs:")
    later: set[str] = set()  # jobs with a newer run than the row at hand (newest first)
    for r in runs.itertuples():
        status = r.status
        if status == "running" and r.job in later:
            # a newer run started since: this one was killed or crashed before recording
            # its end (what it wrote before that is kept)
            status = "did not finish (no end recorded)"
        later.add(str(r.job))
        print(f"  {r.started:%Y-%m-%d %H:%M:%S}Z  {r.job:<8} {status}")
    print(f"\nopen findings: {len(open_findings)} (times in site time, {site.timezone})")
    for r in open_findings.itertuples():
        more = _episodes(site, str(r.branch), str(r.kind), r.evidence).removeprefix(", ")
        print(f"  {r.branch:<16} {r.kind:<14} since {_local(site, r.start)}"
              f"{f' ({more})' if more else ''}: {r.message}")
    if quarantine:
        print("\nquarantined rows by reason: "
              + ", ".join(f"{k} {v}" for k, v in sorted(quarantine.items())))
    if site.notify is not None:
        sent = int((outbox["status"] == "sent").sum()) if not outbox.empty else 0
        print(f"\nmessages: {sent} sent, {len(undelivered)} not sent")
        for r in undelivered.itertuples():
            what = "GIVEN UP" if r.status == "failed" else f"pending, {r.attempts} tries"
            print(f"  {r.channel!s:<8} {what}: {r.subject!s}"
                  + (f" ({r.last_error!s})" if r.last_error else ""))
    return EXIT_OK


def _analyze_with_progress(
    site: Site, store: ResultsStore, source: ReadingsSource, start: datetime, end: datetime,
    *, quiet: bool, jobs: int,
) -> Any:
    """`monitor.jobs.analyze` with a progress bar on stderr, recorded as a job run."""
    from tqdm import tqdm

    from monitor.jobs import analyze

    # on a terminal the bar redraws itself; into a log file it writes a line each 30 s
    tty = sys.stderr.isatty()
    with tqdm(total=None, unit="window", disable=quiet, file=sys.stderr,
              desc="analysing", mininterval=0.1 if tty else 30.0) as bar:
        def progress(done: int, total: int) -> None:
            bar.total = total
            bar.update(done - bar.n)

        return _run_recorded(
            store, "analyze",
            lambda: analyze(site, store, source, start, end, progress=progress, jobs=jobs),
        )


def _iso_map(frame: pd.DataFrame, key: str, time_col: str) -> dict[str, str]:
    times = pd.to_datetime(frame[time_col], utc=True)
    return {str(k): t.isoformat() for k, t in zip(frame[key], times, strict=True)}


# ---------------------------------------------------------------------------------------
# demo


def _register_demo(verbs: Any) -> None:
    p = _add_verb(
        verbs, "demo", _cmd_demo, "build the demo site and run the whole job on it",
        """\
Build an invented site (the example site file: two pumps on a speed drive, six
branches), simulate months of its historian exports with faults on fixed dates — a
fouling heat exchanger, a valve left throttled, a raised header set point, a frozen
meter — then ingest, analyse and diagnose them into a SQLite store, exactly as the daemon
would. Needs no configuration. The folder is rebuilt on every run.""",
        config=False,
    )
    p.add_argument("--folder", type=Path, default=Path("demo-site"),
                   help="where to build the demo (default: ./demo-site)")
    p.add_argument("--days", type=int, default=150, help="days of data (default 150)")
    p.add_argument("--step", type=float, default=120.0, metavar="SECONDS",
                   help="historian sample interval (default 120 s)")
    p.add_argument("--quiet", action="store_true", help="no progress bars")


def _cmd_demo(args: argparse.Namespace) -> int:

    from monitor.demo import DEMO_START, prepare_demo
    from monitor.jobs import ingest, open_source, write_report
    from monitor.monthly import previous_month, write_monthly
    from monitor.plots import plot_system_curve
    from monitor.whatif import CurveRequest, solve_curve

    if not 30 <= args.days <= 800:
        raise UserError("--days must be between 30 and 800")
    folder = args.folder.resolve()
    print(f"building the demo site in {folder} ({args.days} days of {args.step:.0f}-s data)")
    paths = prepare_demo(folder, days=args.days, step_s=args.step)
    site = load_site(paths.site_file)
    curve = solve_curve(site, CurveRequest())
    if curve.ok:
        plot_system_curve(site, curve, folder / "system-curve.png")
    store = open_store(site.store_url)
    source = open_source(site)
    try:
        print("ingesting the exports ...")
        summary = _run_recorded(store, "ingest", lambda: ingest(site, store, source))
        print(f"  {summary.stored} readings stored, {summary.quarantined} rows quarantined")
        start, end = DEMO_START, DEMO_START + timedelta(days=args.days)
        result = _analyze_with_progress(site, store, source, start, end, quiet=args.quiet,
                                        jobs=default_jobs())
        fits = store.read_fits()
        _write_fits_csv(fits, folder / "fits.csv")
        # the last whole month of the period, then the morning report that links to it
        monthly = write_monthly(site, store, month=previous_month(site, end),
                                generated=datetime.now(UTC))
        report = write_report(site, store, day=end - timedelta(hours=12),
                              now=datetime.now(UTC))
    finally:
        source.close()
        store.close()
    findings_file = folder / "findings.json"
    findings_file.write_text(json.dumps([f.to_json_dict() for f in result.findings], indent=2))
    print(f"\n{result.windows} days analysed, {result.fits_ok} of {result.fits} branch fits "
          f"usable, {len(result.findings)} findings:")
    _print_findings(site, result.findings)
    print(f"\nfiles in {folder}:")
    for name in ("site.toml", "findings.json", "fits.csv", "system-curve.png"):
        print(f"  {name}")
    print(f"  {report.relative_to(folder)}   <- the morning report: open it in a browser")
    print(f"  {monthly.relative_to(folder)}   <- the long view of the last whole month")
    print(f"\ntry: branchwatch status {paths.site_file}")
    return EXIT_OK


# ---------------------------------------------------------------------------------------
# alarms


def _register_alarms(verbs: Any) -> None:
    p = _add_verb(
        verbs, "alarms", _cmd_alarms, "list, acknowledge, shelve alarms",
        """\
Three kinds of alarm are checked on every ingest, also when the ingest failed: low
flow per branch, frozen meter per flow and pressure transmitter, and stale data
(condition "stale TAG" per tag, and "stale source" under the name 'source' when no tag
has fresh data; [analysis] stale_after). They follow the ISA-18.2 life cycle: normal -> unack
(active, not yet acknowledged) -> ack -> normal; rtn_unack when the condition cleared
before anyone acknowledged; shelved for a time; out_of_service during maintenance. An
action applies to every alarm of the branch unless --condition names one. Without an
action, lists the alarms that are not normal and the latest journal entries; times are
site time.""",
    )
    action = p.add_mutually_exclusive_group()
    action.add_argument("--ack", metavar="BRANCH", help="acknowledge the branch's alarm")
    action.add_argument("--shelve", metavar="BRANCH", help="shelve it (needs --until)")
    action.add_argument("--unshelve", metavar="BRANCH", help="end a shelf")
    action.add_argument("--out-of-service", metavar="BRANCH", help="take it out of service")
    action.add_argument("--in-service", metavar="BRANCH", help="return it to service")
    p.add_argument("--condition", metavar="NAME",
                   help='only this alarm of the branch, e.g. "low_flow", "frozen FT-310" or '
                   '"stale FT-310"')
    p.add_argument("--until", metavar="TIME", help="end of the shelf (site time)")
    p.add_argument("--by", default="", help="who (kept in the alarm journal)")
    p.add_argument("--all", action="store_true", help="list normal alarms too")


def _cmd_alarms(args: argparse.Namespace) -> int:
    from monitor import alarms as life
    from monitor.jobs import alarm_row, alarm_state_from_row

    site = _site(args)
    store = open_store(site.store_url)
    try:
        frame = store.read_alarms()
        now = datetime.now(UTC)
        chosen = [(k, getattr(args, k)) for k in
                  ("ack", "shelve", "unshelve", "out_of_service", "in_service")
                  if getattr(args, k)]
        if not chosen:
            _print_alarms(frame, store, site, show_all=args.all)
            return EXIT_OK
        action, branch = chosen[0]
        if branch not in ("header", "source"):
            site.branch(branch)
        until = None
        if action == "shelve" and args.until:
            until = _parse_time(args.until, site, "--until")
            if until <= now:
                raise UserError(f"--until {args.until!r} ({_local(site, until)} site time) is "
                                f"not in the future (now {_local(site, now)}); give a later "
                                "time to shelve until")
        rows = [r for r in frame.to_dict(orient="records") if str(r["branch"]) == branch
                and (args.condition is None or str(r["condition"]) == args.condition)]
        if not rows:
            raise UserError(f"branch {branch!r} has no alarm"
                            + (f" {args.condition!r}" if args.condition else "")
                            + " yet (never evaluated)")
        if action == "shelve" and not args.until:
            raise UserError("--shelve needs --until TIME")
        changed = []
        for row in rows:
            state = alarm_state_from_row(row)
            if action == "ack":
                new, _ = life.acknowledge(state, now, args.by)
            elif action == "shelve":
                assert until is not None
                new, _ = life.shelve(state, until, now=now, by=args.by)
            elif action == "unshelve":
                new, _ = life.unshelve(state, now=now, by=args.by)
            elif action == "out_of_service":
                new, _ = life.remove_from_service(state, now=now, by=args.by)
            else:
                new, _ = life.return_to_service(state, now=now, by=args.by)
            if new != state:
                changed.append(alarm_row(new, limit_m3s=row.get("limit_value"), now=now))
                print(f"{branch} {state.condition}: {state.state.value} -> {new.state.value}")
        if changed:
            store.upsert_alarms(changed)
        else:
            print(f"{branch}: nothing to do")
    except KeyError as exc:
        raise UserError(str(exc).strip('"')) from None
    finally:
        store.close()
    return EXIT_OK


def _print_alarms(frame: pd.DataFrame, store: ResultsStore, site: Site, *,
                  show_all: bool) -> None:
    from monitor.alarms import describe_condition

    shown = frame if show_all else frame[frame["state"] != "normal"]
    print(f"times in site time ({site.timezone})")
    if shown.empty:
        print("no alarms" + ("" if show_all else " standing (all normal)"))
    for r in shown.to_dict(orient="records"):
        since = r.get("activated")
        when = f" since {_local(site, since)}" if since is not None and \
            not pd.isna(since) else ""
        print(f"  {r['branch']:<16} {r['condition']:<14} {r['state']:<15}{when}  "
              f"{r['message']}")
    journal = store.alarm_events()
    if not journal.empty:
        print("\nlatest journal entries:")
        for r in journal.tail(10).to_dict(orient="records"):
            what = describe_condition(str(r["branch"]), str(r["condition"]))
            print(f"  {_local(site, r['time'])}  {what:<36} "
                  f"{r['from_state'] or '-'} -> {r['to_state']}")


# ---------------------------------------------------------------------------------------
# report


def _register_report(verbs: Any) -> None:
    p = _add_verb(
        verbs, "report", _cmd_report, "write the morning or the monthly report (HTML)",
        """\
Write the morning report for a day (default: yesterday, site time) into the site's
report folder ([report] folder, default ./reports beside the site file): what needs
attention, standing alarms, every branch's resistance ratio against its cleaning limit,
the trends, data health. With --month, the monthly report instead: each branch's
resistance ratio over the last 12-24 months with findings, maintenance and the fouling
forecast marked, and the extra pumping, lost flow and their cost ([cost] energy_price)
month by month; the month's daily fits go beside it as CSV. One self-contained HTML
file each; open it in any browser.""",
    )
    when = p.add_mutually_exclusive_group()
    when.add_argument("--date", metavar="DAY", help="the day to report (site time)")
    when.add_argument("--month", metavar="YYYY-MM",
                      help="write the monthly report of this calendar month (site time)")


def _cmd_report(args: argparse.Namespace) -> int:
    from monitor.jobs import ReportWriteError, write_report

    site = _site(args)
    now = datetime.now(UTC)
    if args.month:
        return _monthly_report(site, args.month, now)
    day = (_parse_time(args.date, site, "--date") if args.date
           else now - timedelta(days=1))
    store = open_store(site.store_url)
    try:
        path = _run_recorded(store, "report",
                             lambda: write_report(site, store, day=day, now=now))
    except ReportWriteError as exc:
        raise UserError(str(exc)) from None
    finally:
        store.close()
    print(f"morning report written to {path}")
    return EXIT_OK


def _monthly_report(site: Site, text: str, now: datetime) -> int:
    from monitor.monthly import month_bounds, parse_month, write_monthly

    try:
        month = parse_month(text)
    except ValueError as exc:
        raise UserError(f"--month: {exc}") from None
    start, end = month_bounds(site, month)
    store = open_store(site.store_url)
    try:
        if store.read_fits(start=start, end=end).empty:
            marks = store.watermarks().fits
            held = ("no fits are stored yet" if marks.empty else
                    f"fits are stored up to {_local(site, marks['last_window_end'].max())}")
            raise UserError(f"--month {month}: no fits stored for that month ({held}); run "
                            "'branchwatch analyze' for it first, or pick a month with fits")
        path = _run_recorded(store, "monthly",
                             lambda: write_monthly(site, store, month=month, generated=now))
    finally:
        store.close()
    print(f"monthly report written to {path}")
    print(f"its daily fits: {path.with_name(path.stem + '-fits.csv')}")
    return EXIT_OK


# ---------------------------------------------------------------------------------------
# run (the daemon)


def _register_run(verbs: Any) -> None:
    p = _add_verb(
        verbs, "run", _cmd_run, "run the daemon: ingest, alarms, daily analysis",
        """\
Run until stopped (Ctrl-C or SIGTERM): ingest new readings every
[schedule] ingest_every and evaluate the alarms on them (low flow, frozen meter, stale
data: also when the ingest failed); analyse the windows that closed since the last run
every day at [schedule] analyze_at (site time), catching up after downtime; write the
morning report at [schedule] report_at, and on the 1st of each month, at the same time,
the monthly report of the month before. On start it ingests at once, then runs an
analysis, morning or monthly report whose scheduled time passed while it was not running. A
results store that cannot be opened at start is tried again, waiting longer each time
(up to 5 min), until it can. A failed job is logged and retried at its next run;
stopping waits for the running job, and every job writes in transactions, so nothing is
half-stored.""",
    )
    p.add_argument("--health-file", type=Path,
                   help="write a JSON heartbeat here (default: beside the store)")
    p.add_argument("--for", dest="duration", type=float, metavar="SECONDS",
                   help="stop after this many seconds (for trials)")


def _cmd_run(args: argparse.Namespace) -> int:
    from monitor.daemon import Daemon, wait_for
    from monitor.jobs import catch_up, ingest, ingest_and_watch, open_source, write_report
    from monitor.monthly import previous_month, write_monthly
    from monitor.notifications import build_notifiers, deliver, queue_alarms, queue_digest

    site = _site(args)
    try:
        build_notifiers(site)  # a bad [notify] setting stops the start, before waiting
    except ValueError as exc:
        raise UserError(str(exc)) from None
    where = f"results store {mask_secrets(site.store_url)}"
    # A store that is down at start is waited for, not given up on: the daemon is often
    # started by the system before its database server is ready.
    store = wait_for(lambda: open_store(site.store_url), what=where,
                     secret_url=site.store_url, give_up_after_s=args.duration,
                     retry_on=(BranchwatchAdapterError, ConnectionError, OSError))
    if store is None:
        raise UserError(f"{where} could not be opened within --for {args.duration:g} s")
    try:
        source = open_source(site)
    except Exception:
        store.close()
        raise

    notifiers = build_notifiers(site)

    def ingest_job() -> None:
        watch = ingest_and_watch(site, store, source, run_ingest=lambda: _run_recorded(
            store, "ingest", lambda: ingest(site, store, source)))
        if notifiers:
            queue_alarms(site, store, now=datetime.now(UTC))
        if watch.error is not None:
            raise watch.error  # counted as a failed run; the alarms were judged

    def analyze_job() -> None:
        _run_recorded(store, "analyze",
                      lambda: catch_up(site, store, source, now=datetime.now(UTC)))

    reports_lock = threading.Lock()

    def report_job() -> None:
        now = datetime.now(UTC)
        day = now - timedelta(days=1)
        with reports_lock:
            path = _run_recorded(store, "report", lambda: write_report(
                site, store, day=day, now=now))
        if notifiers:
            queue_digest(site, store, path, day=day, now=now)

    def notify_job() -> None:
        deliver(site, store, notifiers, now=datetime.now(UTC))

    def monthly_job() -> None:
        # the month before this one; then the morning report of yesterday again, so that
        # whichever of the two ran first on the 1st, it links to the new monthly report
        now = datetime.now(UTC)
        with reports_lock:
            _run_recorded(store, "monthly", lambda: write_monthly(
                site, store, month=previous_month(site, now), generated=now))
            write_report(site, store, day=now - timedelta(days=1), now=now)

    def last_ok(job: str) -> datetime | None:
        runs = store.job_runs(limit=50, job=job)
        ok = runs[runs["status"] == "ok"] if not runs.empty else runs
        return None if ok.empty else pd.Timestamp(ok["started"].max()).to_pydatetime()

    health = args.health_file or site.report_folder / "branchwatch-health.json"
    jobs = {"ingest": ingest_job, "analyze": analyze_job, "report": report_job,
            "monthly": monthly_job}
    if notifiers:
        jobs["notify"] = notify_job
    daemon = Daemon(site, jobs, health_file=health, last_ok=last_ok)
    print(f"branchwatch running for {site.name}; heartbeat in {health}; Ctrl-C stops")
    try:
        stats = daemon.run(duration_s=args.duration)
    finally:
        source.close()
        store.close()
    print(f"stopped: runs {stats.runs}, failures {stats.failures}")
    return EXIT_OK


def _register_notify(verbs: Any) -> None:
    p = _add_verb(
        verbs, "notify", _cmd_notify, "send what waits in the outbox; --test sends one",
        """Send the messages that wait in the outbox ([notify.email], [notify.webhook]) and list
those not sent. The daemon does this every minute by itself; this verb is for trying the
settings: --test queues one test message on every channel and sends it now. A message
that fails for now is tried again later (1, 2, 4 ... minutes apart, up to [notify]
retry_for); one the server refuses for good (a wrong password, an unknown recipient) is
given up at once and shown here, in 'status' and in the next morning report.""",
    )
    p.add_argument("--test", action="store_true", help="queue and send one test message")


def _cmd_notify(args: argparse.Namespace) -> int:
    from monitor.notifications import build_notifiers, deliver, queue_test

    site = _site(args)
    try:
        notifiers = build_notifiers(site)
    except ValueError as exc:
        raise UserError(str(exc)) from None
    if not notifiers:
        raise UserError(f"{site.path.name}: no [notify.email] or [notify.webhook] section; "
                        "nobody to tell (see config/example-site.toml)")
    store = open_store(site.store_url)
    try:
        now = datetime.now(UTC)
        if args.test:
            queue_test(site, store, now=now)
        done = deliver(site, store, notifiers, now=now)
        waiting = store.outbox(status="pending")
        failed = store.outbox(status="failed")
    finally:
        store.close()
    print(f"sent {done.sent}; {done.retrying} to be tried again, {done.failed} given up now")
    for n in notifiers:
        print(f"  channel {n.name}: {n.describe()}")
    for frame, what in ((waiting, "waiting"), (failed, "given up")):
        for r in frame.itertuples():
            print(f"  {what}: {r.channel!s} {r.subject!s}"
                  + (f" ({r.last_error!s})" if r.last_error else ""))
    return EXIT_OK if done.failed == 0 and not (args.test and done.sent == 0) else EXIT_USAGE


_VERBS: list[Callable[[Any], None]] = [
    _register_demo,
    _register_check,
    _register_curve,
    _register_ingest,
    _register_analyze,
    _register_log,
    _register_status,
    _register_alarms,
    _register_notify,
    _register_report,
    _register_run,
]


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
