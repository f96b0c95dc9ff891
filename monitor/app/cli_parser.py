"""The argument parser of the ``branchwatch`` command line: the verbs, their options
and their help texts. `monitor.app.cli` hands in the function that runs each verb.
"""

from __future__ import annotations

import argparse
import os
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

__all__ = ["ALARM_OPTIONS", "EXAMPLES", "MAX_DEFAULT_JOBS", "build_parser", "default_jobs",
           "positive_int"]

#: What runs a verb: its parsed arguments in, the exit status out (None: 0).
Handler = Callable[[argparse.Namespace], "int | None"]


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


def build_parser(handlers: Mapping[str, Handler]) -> argparse.ArgumentParser:
    """The ``branchwatch`` parser; each verb runs ``handlers[verb]`` (one for every verb
    registered here, or `KeyError` names the one missing)."""
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
    for name, sub in verbs.choices.items():
        sub.set_defaults(func=handlers[name])
    return parser


def _add_verb(
    verbs: Any, name: str, summary: str, description: str, *, config: bool = True,
) -> argparse.ArgumentParser:
    p: argparse.ArgumentParser = verbs.add_parser(
        name, help=summary, description=description,
        epilog="examples:\n" + "\n".join(f"  {line}" for line in EXAMPLES[name]),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    if config:
        p.add_argument("config", metavar="CONFIG", type=Path, help="site file (TOML)")
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
        "branchwatch analyze site.toml --from 2021-09-01 --to 2026-09-01 --executor dask "
        "--scheduler tcp://10.0.0.5:8786",
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
    "fleet": (
        "branchwatch fleet fleet.toml",
        "branchwatch fleet fleet.toml --from 2026-08-01 --to 2026-09-01 --executor dask",
        "branchwatch fleet fleet.toml --report /srv/reports/fleet.html --json",
    ),
    "run": (
        "branchwatch run site.toml",
        "branchwatch run site.toml --for 600 --health-file /tmp/bw-health.json   # a trial",
    ),
}


def _register_curve(verbs: Any) -> None:
    p = _add_verb(verbs, "curve", "system curve, pump operating point and branch split",
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


def _register_check(verbs: Any) -> None:
    _add_verb(verbs, "check", "validate a site file and reach its data source and store",
        """\
Validate the site file (every key, unit and tag), build each branch's model, open the
results store (creating or upgrading its tables), and reach the readings source. Prints
what it found; exits 2 when anything is wrong, naming what to fix.""",
    )


def _register_ingest(verbs: Any) -> None:
    p = _add_verb(verbs, "ingest", "read new readings from the source into the store",
        """\
One ingest pass: every export file (or database row) the store has not seen yet is read,
converted to SI, and stored. Bad rows are quarantined with file, line and reason and never
stop the pass. Running it twice stores nothing new; a pass killed part-way resumes where
the last stored batch ended. Then the alarms are evaluated (low flow, frozen meter, stale
data; see 'branchwatch alarms --help') — also when the ingest failed, so a source that
has stopped delivering raises its stale-data alarm.""",
    )
    p.add_argument("--json", action="store_true", help="print the summary as JSON")


def _register_analyze(verbs: Any) -> None:
    p = _add_verb(verbs, "analyze", "fit and diagnose a period (backfill)",
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
        "the period, as the ingest checks would have (the live checks look back only 24 h): "
        "for "
        "files of a past period read late. Each alarm change is journalled at its own "
        "historic time; stale-data alarms are not replayed",
    )
    p.add_argument(
        "--jobs", type=positive_int, default=default_jobs(), metavar="N",
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
    _add_executor_options(p)


def _add_executor_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--executor", choices=("local", "dask"), default="local",
        help="""where the windows are analysed: 'local' (default) in this process and
        its --jobs worker processes; 'dask' on a Dask distributed cluster, in tasks of
        one month of windows for a group of branches, each task reading only its own
        windows and writing its own results (a retried task rewrites the same rows).
        Needs a PostgreSQL (or other database server) store that every worker can
        reach: a SQLite file is refused. Install with pip install 'branchwatch[fleet]'""",
    )
    p.add_argument(
        "--scheduler", metavar="ADDRESS",
        help="""with --executor dask: the scheduler to use, e.g. tcp://10.0.0.5:8786
        (started with 'dask scheduler'; workers with 'dask worker ADDRESS'). Without it,
        a cluster of --jobs worker processes is started on this machine""",
    )
    p.add_argument(
        "--group-size", type=positive_int, metavar="N",
        help="""with --executor dask: at most N branches per task (default: all the
        site's branches in one task per month); smaller groups spread a large site over
        more workers""",
    )


#: The default of ``analyze --jobs`` never exceeds this many processes: reading from one
#: database, more workers mostly queue on it.
MAX_DEFAULT_JOBS = 4


def default_jobs() -> int:
    """Worker processes for a backfill: the usable cores, at most `MAX_DEFAULT_JOBS`."""
    return max(1, min(len(os.sched_getaffinity(0)), MAX_DEFAULT_JOBS))


def positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be 1 or more, got {value}")
    return value


def _register_log(verbs: Any) -> None:
    p = _add_verb(verbs, "log", "record, correct or withdraw maintenance on a branch",
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
    group.add_argument("--withdraw", metavar="ID", type=positive_int,
                       help="withdraw entry ID (logged in error); it stays in the log, marked")
    group.add_argument("--correct", metavar="ID", type=positive_int,
                       help="correct entry ID: give the right --time and/or --note")
    p.add_argument("--time", metavar="TIME", help="with --correct: the corrected time")
    p.add_argument("--note", default=None,
                   help="free text kept with the entry (with --withdraw: why)")
    p.add_argument("--by", default=None,
                   help="who withdraws or corrects (default: your login name)")
    p.add_argument("--all", action="store_true", help="list withdrawn entries too")


def _register_status(verbs: Any) -> None:
    p = _add_verb(verbs, "status", "last runs, watermarks and data health",
        "How far ingest and analysis have got, the last job runs, and open findings.",
    )
    p.add_argument("--json", action="store_true", help="print JSON")


def _register_demo(verbs: Any) -> None:
    p = _add_verb(verbs, "demo", "build the demo site and run the whole job on it",
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


#: The alarms verb's action options (their ``dest``) and the operations they ask for
#: (`monitor.app.operations.AlarmAction` values).
ALARM_OPTIONS = {
    "ack": "acknowledge", "shelve": "shelve", "unshelve": "unshelve",
    "out_of_service": "remove_from_service", "in_service": "return_to_service",
    "reset": "reset",
}


def _register_alarms(verbs: Any) -> None:
    p = _add_verb(verbs, "alarms", "list, acknowledge, shelve, reset alarms",
        """\
Three kinds of alarm are checked on every ingest, also when the ingest failed: low
flow per branch, frozen meter per flow and pressure transmitter, and stale data
(condition "stale TAG" per tag, and "stale source" under the name 'source' when no tag
has fresh data; [analysis] stale_after). They follow the ISA-18.2 life cycle: normal -> unack
(active, not yet acknowledged) -> ack -> normal; rtn_unack when the condition cleared
before anyone acknowledged; shelved for a time; out_of_service during maintenance. A
latching low-flow alarm ([analysis] low_flow_latching) stays unack or ack after the flow
came back, until it is acknowledged and then reset (--reset; refused while the flow is
still low). An action applies to every alarm of the branch unless --condition names one. Without an
action, lists the alarms that are not normal and the latest journal entries; times are
site time.""",
    )
    action = p.add_mutually_exclusive_group()
    action.add_argument("--ack", metavar="BRANCH", help="acknowledge the branch's alarm")
    action.add_argument("--shelve", metavar="BRANCH", help="shelve it (needs --until)")
    action.add_argument("--unshelve", metavar="BRANCH", help="end a shelf")
    action.add_argument("--out-of-service", metavar="BRANCH", help="take it out of service")
    action.add_argument("--in-service", metavar="BRANCH", help="return it to service")
    action.add_argument("--reset", metavar="BRANCH",
                        help="reset a latched alarm (acknowledged, back to normal)")
    p.add_argument("--condition", metavar="NAME",
                   help='only this alarm of the branch, e.g. "low_flow", "frozen FT-310" or '
                   '"stale FT-310"')
    p.add_argument("--until", metavar="TIME", help="end of the shelf (site time)")
    p.add_argument("--by", default="", help="who (kept in the alarm journal)")
    p.add_argument("--all", action="store_true", help="list normal alarms too")
    p.add_argument("--json", action="store_true",
                   help="print the alarms and journal, or what the action did, as JSON")


def _register_report(verbs: Any) -> None:
    p = _add_verb(verbs, "report", "write the morning or the monthly report (HTML)",
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


def _register_run(verbs: Any) -> None:
    p = _add_verb(verbs, "run", "run the daemon: ingest, alarms, daily analysis",
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


def _register_notify(verbs: Any) -> None:
    p = _add_verb(verbs, "notify", "send what waits in the outbox; --test sends one",
        """Send the messages that wait in the outbox ([notify.email], [notify.webhook]) and list
those not sent. The daemon does this every minute by itself; this verb is for trying the
settings: --test queues one test message on every channel and sends it now. A message
that fails for now is tried again later (1, 2, 4 ... minutes apart, up to [notify]
retry_for); one the server refuses for good (a wrong password, an unknown recipient) is
given up at once and shown here, in 'status' and in the next morning report.""",
    )
    p.add_argument("--test", action="store_true", help="queue and send one test message")


def _register_fleet(verbs: Any) -> None:
    p = _add_verb(
        verbs, "fleet", "several sites: analyse them, rank their branches",
        """Read a fleet file (a list of site files, each with its own store, or one shared
PostgreSQL store with a schema per site), optionally analyse every site over a period
first, then write the fleet summary page: every site's branches ranked by the cost of
their open findings (extra pumping energy, lost flow). With --executor dask all sites
are analysed in one run on the cluster; their stores must be database servers
(PostgreSQL), not SQLite files.""",
        config=False,
    )
    p.add_argument("config", metavar="FLEET", type=Path, help="fleet file (TOML)")
    p.add_argument("--from", dest="start", metavar="DATE",
                   help="analyse every site from this day first (with --to)")
    p.add_argument("--to", dest="end", metavar="DATE", help="end of the period (exclusive)")
    p.add_argument("--jobs", type=positive_int, default=default_jobs(), metavar="N",
                   help="as for analyze")
    _add_executor_options(p)
    p.add_argument("--report", type=Path, metavar="FILE",
                   help="write the summary page here instead of [fleet] report")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--json", action="store_true", help="print the ranking as JSON")


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
    _register_fleet,
]

