"""The ``branchwatch`` command line.

Each verb is a thin layer: parse arguments (`monitor.cli_parser`), call the job,
operation or model function (`monitor.jobs`, `monitor.operations`, ...), print its
record as readable lines or JSON with ``--json`` (`monitor.cli_text`). Errors a user can
fix — a bad config, an unreachable database, an impossible what-if — print one line
naming the cause and exit with status 2; a bug still shows its traceback.
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

import pandas as pd

from adapters.base import (
    BranchwatchAdapterError,
    MaintenanceKind,
    ReadingsSource,
    ResultsStore,
    open_store,
)
from adapters.credentials import MaskingFormatter, mask_secrets
from adapters.units import UnitError, parse_quantity
from monitor.cli_parser import ALARM_OPTIONS, build_parser, default_jobs
from monitor.cli_text import (
    analyze_with_progress,
    local,
    print_alarm_action,
    print_alarm_events,
    print_alarms,
    print_delivery,
    print_findings,
    print_ingest,
    print_log,
    print_status,
    watch_json,
    write_fits_csv,
)
from monitor.config import ConfigError, Site, load_site

log = logging.getLogger(__name__)

EXIT_OK = 0
EXIT_USAGE = 2


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


def _site(args: argparse.Namespace) -> Site:
    """The validated site of the verb's CONFIG argument (`ConfigError` names file and key)."""
    return load_site(args.config)


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


def _site_store(site: Site) -> ResultsStore:
    """The site's own results store, in the schema its ``[store] schema`` names."""
    return open_store(site.store_url, schema=site.store_schema)


def _store_text(site: Site) -> str:
    """The site's store for a message: its URL, passwords masked, and its schema."""
    schema = f", schema {site.store_schema}" if site.store_schema else ""
    return mask_secrets(site.store_url) + schema


def _open(site: Site, *, shared: tuple[str, str] | None = None
          ) -> tuple[ResultsStore, ReadingsSource]:
    """The site's store and readings source; bad [source] settings (an unset url_env, a
    secrets file that is missing, unreadable, open to others or holds no URL, a missing
    driver) become one `UserError` line naming the file and key. *shared* (URL, schema):
    a fleet's shared store, used instead of the site's own."""
    from monitor.ingest import open_source

    store = (_site_store(site) if shared is None
             else open_store(shared[0], schema=shared[1]))
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
    from monitor.operations import run_recorded

    return run_recorded(store, job, func)


def _cmd_check(args: argparse.Namespace) -> int:
    site = _site(args)
    print(f"site file ok: {site.name} ({len(site.branches)} branches, {len(site.tags)} tags)")
    problems: list[str] = []
    try:
        store, source = _open(site)
    except (BranchwatchAdapterError, ImportError, ValueError, KeyError) as exc:
        raise UserError(str(exc)) from None
    try:
        print(f"results store ok: {_store_text(site)}")
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


def _cmd_ingest(args: argparse.Namespace) -> int:
    from monitor.alarm_watch import ingest_and_watch
    from monitor.ingest import ingest

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
        print(json.dumps(watch_json(site, watch), indent=2, default=str))
    else:
        if summary is not None:
            print_ingest(summary)
        print_alarm_events(site, watch.events)
    if watch.error is not None:
        raise watch.error  # one line for a user's error (main), a traceback for a bug
    return EXIT_OK


def _cmd_analyze(args: argparse.Namespace) -> int:
    from monitor.diagnose import findings_to_json

    site = _site(args)
    start = _parse_time(args.start, site, "--from")
    end = _parse_time(args.end, site, "--to")
    if end <= start:
        raise UserError("--to must be after --from")
    if args.executor != "dask" and (args.scheduler or args.group_size):
        raise UserError("--scheduler and --group-size need --executor dask")
    store, source = _open(site)
    try:
        if args.executor == "dask":
            from monitor.cli_fleet import analyze_on_cluster

            summary = analyze_on_cluster(site, store, source, start, end, args)
        else:
            summary = analyze_with_progress(site, store, source, start, end,
                                            quiet=args.quiet, jobs=args.jobs)
        if args.fits:
            from monitor.windows import current_fits

            write_fits_csv(current_fits(site, store.read_fits(start=start, end=end)),
                            args.fits)
        replayed = None
        if args.alarms:
            from monitor.alarm_watch import replay_alarms

            replayed = replay_alarms(site, store, source, start, end)
    finally:
        source.close()
        store.close()
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
        raise UserError(f"{what} {local(site, when)} ({site.timezone}) is in the future; "
                        "log maintenance once it is done")


def _cmd_log(args: argparse.Namespace) -> int:
    site = _site(args)
    given = {k.value: getattr(args, k) for k in _EVENT_KINDS if getattr(args, k)}
    if args.time is not None and args.correct is None:
        raise UserError("--time goes with --correct ID; to record new work give "
                        "BRANCH --cleaned TIME (or another kind)")
    if args.correct is not None and args.time is None and args.note is None:
        raise UserError(f"--correct {args.correct} needs the corrected --time and/or --note")
    if given and args.branch is None:
        raise UserError("name the branch the work was done on, e.g. "
                        f"'branchwatch log {args.config} BRANCH --cleaned 2026-08-14'")
    store = _site_store(site)
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
            print_log(site, store.maintenance(args.branch, include_withdrawn=args.all))
        else:
            site.branch(args.branch)  # unknown names are refused with the list of branches
            kind, text = next(iter(given.items()))
            when = _parse_time(text, site, f"--{kind.replace('_', '-')}")
            _not_future(when, f"--{kind.replace('_', '-')}", site)
            entry = store.add_maintenance(args.branch, kind, when, args.note or "")
            print(f"recorded: entry {entry}, {args.branch} {kind.replace('_', ' ')} at "
                  f"{local(site, when)} ({site.timezone})")
    except KeyError as exc:
        raise UserError(str(exc).strip('"')) from None
    except ValueError as exc:  # the store refuses: unknown id, already withdrawn, future
        raise UserError(str(exc)) from None
    finally:
        store.close()
    return EXIT_OK


def _cmd_status(args: argparse.Namespace) -> int:
    from monitor.operations import status_summary

    site = _site(args)
    store = _site_store(site)
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
    from monitor.demo import DEMO_START, prepare_demo
    from monitor.diagnose import findings_to_json
    from monitor.ingest import ingest, open_source
    from monitor.monthly import write_monthly
    from monitor.monthly_view import previous_month
    from monitor.morning_report import write_report
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
    store = _site_store(site)
    source = open_source(site)
    try:
        print("ingesting the exports ...")
        summary = _run_recorded(store, "ingest", lambda: ingest(site, store, source))
        print(f"  {summary.stored} readings stored, {summary.quarantined} rows quarantined")
        start, end = DEMO_START, DEMO_START + timedelta(days=args.days)
        result = analyze_with_progress(site, store, source, start, end, quiet=args.quiet,
                                        jobs=default_jobs())
        fits = store.read_fits()
        write_fits_csv(fits, folder / "fits.csv")
        # the last whole month of the period, then the morning report that links to it
        monthly = write_monthly(site, store, month=previous_month(site, end),
                                generated=datetime.now(UTC))
        report = write_report(site, store, day=end - timedelta(hours=12),
                              now=datetime.now(UTC))
    finally:
        source.close()
        store.close()
    findings_file = folder / "findings.json"
    findings_file.write_text(json.dumps(findings_to_json(result.findings), indent=2))
    print(f"\n{result.windows} days analysed, {result.fits_ok} of {result.fits} branch fits "
          f"usable, {len(result.findings)} findings:")
    print_findings(site, result.findings)
    print(f"\nfiles in {folder}:")
    for name in ("site.toml", "findings.json", "fits.csv", "system-curve.png"):
        print(f"  {name}")
    print(f"  {report.relative_to(folder)}   <- the morning report: open it in a browser")
    print(f"  {monthly.relative_to(folder)}   <- the long view of the last whole month")
    print(f"\ntry: branchwatch status {paths.site_file}")
    return EXIT_OK


def _cmd_alarms(args: argparse.Namespace) -> int:
    from monitor.operations import (
        AlarmAction,
        OperationError,
        ShelfEndError,
        alarm_action,
        alarm_listing,
    )

    site = _site(args)
    store = _site_store(site)
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
            until = _parse_time(args.until, site, "--until")
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
    from monitor.morning_report import ReportWriteError, write_report

    site = _site(args)
    now = datetime.now(UTC)
    if args.month:
        return _monthly_report(site, args.month, now)
    day = (_parse_time(args.date, site, "--date") if args.date
           else now - timedelta(days=1))
    store = _site_store(site)
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
    from monitor.monthly import write_monthly
    from monitor.monthly_view import month_bounds, parse_month

    try:
        month = parse_month(text)
    except ValueError as exc:
        raise UserError(f"--month: {exc}") from None
    start, end = month_bounds(site, month)
    store = _site_store(site)
    try:
        if store.read_fits(start=start, end=end).empty:
            marks = store.watermarks().fits
            held = ("no fits are stored yet" if marks.empty else
                    f"fits are stored up to {local(site, marks['last_window_end'].max())}")
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
    from monitor.daemon import Daemon, last_ok_run, site_jobs, wait_for
    from monitor.ingest import open_source
    from monitor.notifications import build_notifiers

    site = _site(args)
    try:
        build_notifiers(site)  # a bad [notify] setting stops the start, before waiting
    except ValueError as exc:
        raise UserError(str(exc)) from None
    where = f"results store {_store_text(site)}"
    # A store that is down at start is waited for, not given up on: the daemon is often
    # started by the system before its database server is ready.
    store = wait_for(lambda: _site_store(site), what=where,
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
    health = args.health_file or site.report_folder / "branchwatch-health.json"
    daemon = Daemon(site, site_jobs(site, store, source, notifiers), health_file=health,
                    last_ok=last_ok_run(store))
    print(f"branchwatch running for {site.name}; heartbeat in {health}; Ctrl-C stops")
    try:
        stats = daemon.run(duration_s=args.duration)
    finally:
        source.close()
        store.close()
    print(f"stopped: runs {stats.runs}, failures {stats.failures}")
    return EXIT_OK


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
    store = _site_store(site)
    try:
        now = datetime.now(UTC)
        if args.test:
            queue_test(site, store, now=now)
        done = deliver(site, store, notifiers, now=now)
        waiting = store.outbox(status="pending")
        failed = store.outbox(status="failed")
    finally:
        store.close()
    print_delivery(done, notifiers, waiting=waiting, failed=failed)
    return EXIT_OK if done.failed == 0 and not (args.test and done.sent == 0) else EXIT_USAGE


def _cmd_fleet(args: argparse.Namespace) -> int:
    from monitor.cli_fleet import cmd_fleet

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
