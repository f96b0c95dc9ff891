"""The ``branchwatch`` command line.

Each verb is a thin layer: parse arguments (`monitor.app.cli_parser`), open the site's store
and source (`monitor.app.cli_site`), call the job, operation or model function
(`monitor.app.jobs`, `monitor.app.operations`, `monitor.app.maintenance_log`, ...), print its record
as readable lines or JSON with ``--json`` (`monitor.app.cli_text`). Errors a user can fix —
a bad config, an unreachable database, an impossible what-if — print one line naming the
cause and exit with status 2; a bug still shows its traceback.
"""

from __future__ import annotations

import argparse
import io
import json
import logging
import os
import sys
from collections.abc import Callable, Sequence
from datetime import UTC, datetime, timedelta
from typing import Any

from adapters.base import BranchwatchAdapterError, ResultsStore
from adapters.credentials import MaskingFormatter
from adapters.fit_record import fits_of
from adapters.records import MaintenanceKind
from adapters.units import UnitError, parse_quantity
from monitor.app.cli_parser import ALARM_OPTIONS, build_parser, default_jobs
from monitor.app.cli_site import (
    EXIT_OK,
    EXIT_USAGE,
    UserError,
    error_text,
    notifiers,
    open_site,
    operator_name,
    parse_time,
    site_of,
    site_store,
    store_text,
)
from monitor.app.cli_text import (
    analyze_with_progress,
    local,
    print_alarm_action,
    print_alarm_events,
    print_alarms,
    print_analysis,
    print_delivery,
    print_demo,
    print_ingest,
    print_log,
    print_status,
    watch_json,
    write_fits_csv,
)
from monitor.site.config import ConfigError, Site

log = logging.getLogger(__name__)

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
        print(f"branchwatch {args.verb}: error: {error_text(exc, args)}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(f"branchwatch {args.verb}: interrupted; what was stored is kept", file=sys.stderr)
        return 130
    finally:
        os.umask(old_umask)


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


def _cmd_curve(args: argparse.Namespace) -> int:
    from monitor.analysis.whatif import CurveRequest, solve_curve

    site = site_of(args)
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
        from monitor.app.plots import plot_system_curve

        plot_system_curve(site, result, args.plot)
    if args.json:
        print(json.dumps(result.to_json_dict(), indent=2))
    else:
        print(result.table())
        if args.plot:
            print(f"\nplot written to {args.plot}")
    return EXIT_OK


def _run_recorded(store: ResultsStore, job: str, func: Callable[[], Any]) -> Any:
    from monitor.app.operations import run_recorded

    return run_recorded(store, job, func)


def _cmd_check(args: argparse.Namespace) -> int:
    site = site_of(args)
    print(f"site file ok: {site.name} ({len(site.branches)} branches, {len(site.tags)} tags)")
    problems: list[str] = []
    try:
        store, source = open_site(site)
    except (BranchwatchAdapterError, ImportError, ValueError, KeyError) as exc:
        raise UserError(str(exc)) from None
    try:
        print(f"results store ok: {store_text(site)}")
        problems = source.check()
        print(f"readings source {source.name}: " + ("ok" if not problems else "PROBLEMS"))
        for p in problems:
            print(f"  - {p}")
    finally:
        source.close()
        store.close()
    for n in notifiers(site):  # reaching them sends a message: 'notify --test' does that
        print(f"notify channel {n.name}: {n.describe()} ('branchwatch notify CONFIG --test' "
              "sends a test message)")
    if site.notify is None:
        print("notify: no [notify] section; alarms are only stored and shown")
    return EXIT_USAGE if problems else EXIT_OK


def _cmd_ingest(args: argparse.Namespace) -> int:
    from monitor.app.alarm_watch import ingest_and_watch
    from monitor.app.ingest import ingest

    site = site_of(args)
    store, source = open_site(site)
    try:
        watch = ingest_and_watch(site, store, source, run_ingest=lambda: _run_recorded(
            store, "ingest", lambda: ingest(site, store, source)))
    finally:
        source.close()
        store.close()
    summary = watch.summary
    if args.json:
        print(json.dumps(watch_json(site, watch), indent=2, default=str))
    else:
        if summary is not None:
            print_ingest(summary)
        print_alarm_events(site, watch.events)
    if watch.error is not None:
        raise watch.error  # one line for a user's error (main), a traceback for a bug
    return EXIT_OK


def _cmd_analyze(args: argparse.Namespace) -> int:
    from monitor.analysis.diagnose import findings_to_json

    site = site_of(args)
    start = parse_time(args.start, site, "--from")
    end = parse_time(args.end, site, "--to")
    if end <= start:
        raise UserError("--to must be after --from")
    if args.executor != "dask" and (args.scheduler or args.group_size):
        raise UserError("--scheduler and --group-size need --executor dask")
    store, source = open_site(site)
    try:
        if args.executor == "dask":
            from monitor.app.cli_fleet import analyze_on_cluster

            summary = analyze_on_cluster(site, store, source, start, end, args)
        else:
            summary = analyze_with_progress(site, store, source, start, end,
                                            quiet=args.quiet, jobs=args.jobs)
        if args.fits:
            from monitor.app.windows import current_fits

            write_fits_csv(fits_of(current_fits(site, store.read_fits(start=start, end=end))),
                           args.fits)
        replayed = None
        if args.alarms:
            from monitor.app.alarm_watch import replay_alarms

            replayed = replay_alarms(site, store, source, start, end)
    finally:
        source.close()
        store.close()
    print_analysis(site, summary, replayed)
    if args.findings:
        args.findings.parent.mkdir(parents=True, exist_ok=True)
        args.findings.write_text(
            json.dumps(findings_to_json(summary.findings), indent=2)
        )
        print(f"findings written to {args.findings}")
    if args.fits:
        print(f"fits written to {args.fits}")
    return EXIT_OK


#: The maintenance kinds the log verb records (its options --cleaned, --valve-set, ...).
_EVENT_KINDS = (MaintenanceKind.CLEANED, MaintenanceKind.VALVE_SET,
                MaintenanceKind.METER_CALIBRATED, MaintenanceKind.OTHER)


def _cmd_log(args: argparse.Namespace) -> int:
    from monitor.app.maintenance_log import (
        FutureWorkError,
        correct_entry,
        record_entry,
        withdraw_entry,
    )

    site = site_of(args)
    given = {k.value: getattr(args, k) for k in _EVENT_KINDS if getattr(args, k)}
    if args.time is not None and args.correct is None:
        raise UserError("--time goes with --correct ID; to record new work give "
                        "BRANCH --cleaned TIME (or another kind)")
    if args.correct is not None and args.time is None and args.note is None:
        raise UserError(f"--correct {args.correct} needs the corrected --time and/or --note")
    if given and args.branch is None:
        raise UserError("name the branch the work was done on, e.g. "
                        f"'branchwatch log {args.config} BRANCH --cleaned 2026-08-14'")
    store = site_store(site)
    option = "--time"
    try:
        if args.withdraw is not None:
            gone = withdraw_entry(store, args.withdraw, by=operator_name(args),
                                  note=args.note or "")
            print(f"withdrawn: entry {gone.entry} (kept in the log, no longer in force)")
        elif args.correct is not None:
            when = None if args.time is None else parse_time(args.time, site, option)
            fixed = correct_entry(store, args.correct, time=when, note=args.note,
                                  by=operator_name(args), now=datetime.now(UTC))
            print(f"corrected: entry {fixed.entry} withdrawn, replaced by entry "
                  f"{fixed.replaced_by}")
        elif not given:
            print_log(site, store.maintenance(args.branch, include_withdrawn=args.all))
        else:
            site.branch(args.branch)  # an unknown name is refused before its time is read
            kind, text = next(iter(given.items()))
            option = f"--{kind.replace('_', '-')}"
            when = parse_time(text, site, option)
            done = record_entry(site, store, args.branch, kind, when, note=args.note or "",
                                now=datetime.now(UTC))
            print(f"recorded: entry {done.entry}, {done.branch} {kind.replace('_', ' ')} at "
                  f"{local(site, done.time)} ({site.timezone})")
    except FutureWorkError as exc:
        raise UserError(f"{option} {local(site, exc.when)} ({site.timezone}) is in the "
                        "future; log maintenance once it is done") from None
    except KeyError as exc:
        raise UserError(str(exc).strip('"')) from None
    except ValueError as exc:  # the store refuses: unknown id, already withdrawn, future
        raise UserError(str(exc)) from None
    finally:
        store.close()
    return EXIT_OK


def _cmd_status(args: argparse.Namespace) -> int:
    from monitor.app.operations import status_summary

    site = site_of(args)
    store = site_store(site)
    try:
        st = status_summary(site, store, now=datetime.now(UTC))
    finally:
        store.close()
    if args.json:
        print(json.dumps(st.to_json_dict(), indent=2, default=str))
        return EXIT_OK
    print_status(site, st)
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from monitor.app.demo_run import build_demo_site, write_demo_reports
    from monitor.app.ingest import ingest, open_source

    if not 30 <= args.days <= 800:
        raise UserError("--days must be between 30 and 800")
    folder = args.folder.resolve()
    print(f"building the demo site in {folder} ({args.days} days of {args.step:.0f}-s data)")
    demo = build_demo_site(folder, days=args.days, step_s=args.step)
    site = demo.site
    store = site_store(site)
    source = open_source(site)
    try:
        print("ingesting the exports ...")
        summary = _run_recorded(store, "ingest", lambda: ingest(site, store, source))
        print(f"  {summary.stored} readings stored, {summary.quarantined} rows quarantined")
        result = analyze_with_progress(site, store, source, demo.start, demo.end,
                                        quiet=args.quiet, jobs=default_jobs())
        write_fits_csv(fits_of(store.read_fits()), folder / "fits.csv")
        files = write_demo_reports(site, store, folder, result.findings, end=demo.end,
                                   now=datetime.now(UTC))
    finally:
        source.close()
        store.close()
    print_demo(site, result, files, demo.paths)
    return EXIT_OK


def _cmd_alarms(args: argparse.Namespace) -> int:
    from monitor.app.operations import (
        AlarmAction,
        OperationError,
        ShelfEndError,
        alarm_action,
        alarm_listing,
    )

    site = site_of(args)
    store = site_store(site)
    try:
        now = datetime.now(UTC)
        chosen = [(k, getattr(args, k)) for k in ALARM_OPTIONS if getattr(args, k)]
        if not chosen:
            listing = alarm_listing(store, show_all=args.all)
            if args.json:
                print(json.dumps(listing.to_json_dict(), indent=2))
            else:
                print_alarms(site, listing)
            return EXIT_OK
        option, branch = chosen[0]
        action = AlarmAction(ALARM_OPTIONS[option])
        until = None
        if action == AlarmAction.SHELVE and args.until:
            until = parse_time(args.until, site, "--until")
        try:
            done = alarm_action(site, store, action, branch, now=now,
                                condition=args.condition, until=until, by=args.by)
        except ShelfEndError:
            if until is None:
                raise UserError("--shelve needs --until TIME") from None
            raise UserError(f"--until {args.until!r} ({local(site, until)} site time) is "
                            f"not in the future (now {local(site, now)}); give a later "
                            "time to shelve until") from None
        except OperationError as exc:
            raise UserError(str(exc)) from None
    except KeyError as exc:
        raise UserError(str(exc).strip('"')) from None
    finally:
        store.close()
    if args.json:
        print(json.dumps(done.to_json_dict(), indent=2))
        return EXIT_USAGE if done.refusals and not done.changes else EXIT_OK
    if done.refusals and not done.changes:
        raise UserError(f"--reset {branch}: " + "; ".join(r.reason for r in done.refusals))
    print_alarm_action(done)
    return EXIT_OK


def _cmd_report(args: argparse.Namespace) -> int:
    from monitor.app.morning_report import ReportWriteError, write_report

    site = site_of(args)
    now = datetime.now(UTC)
    if args.month:
        return _monthly_report(site, args.month, now)
    day = (parse_time(args.date, site, "--date") if args.date
           else now - timedelta(days=1))
    store = site_store(site)
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
    from monitor.app.monthly import month_fits, write_monthly
    from monitor.app.monthly_view import parse_month

    try:
        month = parse_month(text)
    except ValueError as exc:
        raise UserError(f"--month: {exc}") from None
    store = site_store(site)
    try:
        stored = month_fits(site, store, month)
        if not stored.held:
            held = ("no fits are stored yet" if stored.stored_until is None else
                    f"fits are stored up to {local(site, stored.stored_until)}")
            raise UserError(f"--month {month}: no fits stored for that month ({held}); run "
                            "'branchwatch analyze' for it first, or pick a month with fits")
        path = _run_recorded(store, "monthly",
                             lambda: write_monthly(site, store, month=month, generated=now))
    finally:
        store.close()
    print(f"monthly report written to {path}")
    print(f"its daily fits: {path.with_name(path.stem + '-fits.csv')}")
    return EXIT_OK


def _cmd_run(args: argparse.Namespace) -> int:
    from monitor.app.daemon import site_daemon, wait_for
    from monitor.app.ingest import open_source

    site = site_of(args)
    notifiers(site)  # a bad [notify] setting stops the start, before waiting
    where = f"results store {store_text(site)}"
    # A store that is down at start is waited for, not given up on: the daemon is often
    # started by the system before its database server is ready.
    store = wait_for(lambda: site_store(site), what=where,
                     secret_url=site.store_url, give_up_after_s=args.duration,
                     retry_on=(BranchwatchAdapterError, ConnectionError, OSError))
    if store is None:
        raise UserError(f"{where} could not be opened within --for {args.duration:g} s")
    try:
        source = open_source(site)
    except Exception:
        store.close()
        raise
    daemon = site_daemon(site, store, source, health_file=args.health_file)
    print(f"branchwatch running for {site.name}; heartbeat in {daemon.health_file}; "
          "Ctrl-C stops")
    try:
        stats = daemon.run(duration_s=args.duration)
    finally:
        source.close()
        store.close()
    print(f"stopped: runs {stats.runs}, failures {stats.failures}")
    return EXIT_OK


def _cmd_notify(args: argparse.Namespace) -> int:
    from monitor.app.notifications import deliver_now

    site = site_of(args)
    channels = notifiers(site)
    if not channels:
        raise UserError(f"{site.path.name}: no [notify.email] or [notify.webhook] section; "
                        "nobody to tell (see config/example-site.toml)")
    store = site_store(site)
    try:
        report = deliver_now(site, store, channels, now=datetime.now(UTC), test=args.test)
    finally:
        store.close()
    done = report.delivery
    print_delivery(done, channels, waiting=report.waiting, failed=report.failed)
    return EXIT_OK if done.failed == 0 and not (args.test and done.sent == 0) else EXIT_USAGE


def _cmd_fleet(args: argparse.Namespace) -> int:
    from monitor.app.cli_fleet import cmd_fleet

    return cmd_fleet(args)


def _parser() -> argparse.ArgumentParser:
    return build_parser({
        "demo": _cmd_demo, "check": _cmd_check, "curve": _cmd_curve, "ingest": _cmd_ingest,
        "analyze": _cmd_analyze, "log": _cmd_log, "status": _cmd_status,
        "alarms": _cmd_alarms, "notify": _cmd_notify, "report": _cmd_report,
        "run": _cmd_run, "fleet": _cmd_fleet,
    })


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
