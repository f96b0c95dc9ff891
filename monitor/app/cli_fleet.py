"""The CLI's cluster and fleet commands: ``analyze --executor dask`` and ``fleet``.

Parsing is in `monitor.app.cli_parser`; the work in `monitor.app.cluster` and `monitor.app.fleet`.
Here the store and sites are opened, the progress bar drawn and the results printed.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from collections.abc import Sequence
from datetime import UTC, datetime
from typing import Any

from adapters.base import ReadingsSource, ResultsStore
from monitor.app.cli_site import EXIT_OK, UserError, open_site, parse_time
from monitor.app.cli_text import analyze_with_progress
from monitor.site.config import Site, load_site

log = logging.getLogger(__name__)


def analyze_on_cluster(
    site: Site, store: ResultsStore, source: ReadingsSource, start: datetime, end: datetime,
    args: argparse.Namespace,
) -> Any:
    """`monitor.app.cluster.analyze_on_cluster` for one site, with a progress bar of tasks
    and the cluster's dashboard address on stderr, recorded as a job run."""
    from monitor.app.cluster import SiteRun
    from monitor.app.operations import run_recorded

    run = SiteRun(site, store, source)
    return run_recorded(store, "analyze", lambda: cluster_runs([run], start, end, args)[0])


def cluster_runs(runs: Sequence[Any], start: datetime, end: datetime,
                 args: argparse.Namespace) -> list[Any]:
    """Analyse *runs* (`monitor.app.cluster.SiteRun`) on the cluster *args* name, with a
    progress bar; the store is checked before any cluster is started or reached."""
    from tqdm import tqdm

    from monitor.app.cluster import ClusterError, analyze_on_cluster, check_shared, connect

    try:
        for run in runs:
            check_shared(run)
        with connect(args.scheduler, workers=args.jobs) as client:
            if not args.quiet:
                print(f"Dask dashboard: {client.dashboard_link}", file=sys.stderr)
            tty = sys.stderr.isatty()
            with tqdm(total=None, unit="task", disable=args.quiet, file=sys.stderr,
                      desc="analysing", mininterval=0.1 if tty else 30.0) as bar:
                def progress(done: int, total: int) -> None:
                    bar.total = total
                    bar.update(done - bar.n)

                return analyze_on_cluster(client, runs, start, end,
                                          group_size=args.group_size, progress=progress)
    except ClusterError as exc:
        raise UserError(str(exc)) from None


def cmd_fleet(args: argparse.Namespace) -> int:
    """``branchwatch fleet``: analyse the fleet's sites (optional), write and print the
    ranking of their branches by the cost of their open findings."""
    from monitor.app.cluster import SiteRun
    from monitor.app.fleet import build_fleet_report, fleet_ranking, load_fleet

    fleet = load_fleet(args.config)
    if (args.start is None) != (args.end is None):
        raise UserError("give both --from and --to, or neither (summary only)")
    if args.executor != "dask" and (args.scheduler or args.group_size):
        raise UserError("--scheduler and --group-size need --executor dask")
    sites = [load_site(path) for path in fleet.sites]
    opened: list[tuple[Site, ResultsStore, ReadingsSource]] = []
    try:
        for i, site in enumerate(sites):
            if fleet.store_url is None:
                opened.append((site, *open_site(site)))
                continue
            key = fleet.keys[i]
            log.info("%s: results in schema %s of the fleet's shared store (the site "
                     "file's own [store] is not used in a fleet run)", site.name, key)
            opened.append((site, *open_site(site, shared=(fleet.store_url, key))))
        if args.start is not None:
            periods = [(parse_time(args.start, s, "--from"), parse_time(args.end, s, "--to"))
                       for s in sites]
            if any(b <= a for a, b in periods):
                raise UserError("--to must be after --from")
            if args.executor == "dask":
                if len({a for a, _ in periods}) > 1 or len({b for _, b in periods}) > 1:
                    raise UserError("with --executor dask the sites of a fleet must share a "
                                    "time zone, or give --from and --to with a UTC offset")
                runs = [SiteRun(site, store, source) for site, store, source in opened]
                summaries = cluster_runs(runs, periods[0][0], periods[0][1], args)
            else:
                summaries = [analyze_with_progress(site, store, source, a, b,
                                                   quiet=args.quiet, jobs=args.jobs)
                             for (site, store, source), (a, b) in zip(opened, periods,
                                                                      strict=True)]
            for (site, _, _), summary in zip(opened, summaries, strict=True):
                print(f"{site.name}: {summary.windows} windows, {summary.fits} branch fits "
                      f"({summary.fits_ok} usable), {len(summary.findings)} findings",
                      file=sys.stderr if args.json else sys.stdout)
        ranking = fleet_ranking([(site, store) for site, store, _ in opened])
    finally:
        for _, store, source in opened:
            source.close()
            store.close()
    page = build_fleet_report(fleet.name, ranking, generated=datetime.now(UTC),
                              sites=len(sites))
    out = args.report or fleet.report
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(page, encoding="utf-8")
    if args.json:
        print(json.dumps([{
            "site": c.site, "branch": c.branch, "findings": list(c.findings),
            "extra_energy_kwh_per_day": c.extra_energy_kwh_per_day,
            "lost_flow_m3h": c.lost_flow_m3h, "confidence": c.confidence,
            "message": c.message,
        } for c in ranking], indent=2))
    else:
        for i, c in enumerate(ranking, 1):
            if not c.findings:
                continue
            print(f"{i:>3}. {c.site} / {c.branch}: {', '.join(c.findings)}; "
                  f"{c.extra_energy_kwh_per_day:.0f} kWh/day, {c.lost_flow_m3h:.1f} m3/h lost")
        print(f"fleet summary written to {out}")
    return EXIT_OK
