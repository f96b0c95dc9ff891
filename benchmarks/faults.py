"""Fault injection, the long form (issue 9 part 2); the short form is `tests/faults/`.

1. **SIGKILLs**: ``--kills`` (default 24) SIGKILLs at seeded random points of ``ingest``,
   ``analyze --jobs 1``, ``analyze --jobs 2``, ``report`` and ``run`` (the daemon's start-up
   pass: ingest, analysis, report), each followed by a restart of the same command, on the
   example site with a few days of simulated exports. The same commands run once more,
   unkilled, on a copy of the same exports. Printed: kills sent and survived, and what
   the killed store holds against the export files (read with pandas alone) and against
   the unkilled run: readings lost, doubled or changed; fits, findings, alarms, journal
   entries and report files, with any doubling.
2. **The store's database stopped**: for each of ``--servers`` a private server (never
   the machine's shared ones) under ``branchwatch run`` (ingest every 10 s) is stopped for
   ``--outage-min`` minutes (default 10) and started again. Printed: outage minutes ridden
   out, ingest runs and failures, readings exported, stored, lost, doubled.

Exit status 1 when anything was lost or doubled, or the daemon exited.

    .venv/bin/python benchmarks/faults.py [--kills 24] [--outage-min 10]
        [--servers postgresql,mariadb] [--seed N] [--folder DIR]
"""

from __future__ import annotations

import argparse
import random
import shutil
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from monitor.site.config import load_site  # noqa: E402
from tests.faults.harness import (  # noqa: E402
    PrivateMariaDB,
    PrivatePostgres,
    daemon_outage,
    make_site,
    problems,
    run_killed,
    store_counts,
    timed,
)

DAYS = 4


def kills(folder: Path, total: int, seed: int) -> bool:
    """The SIGKILL series; True when nothing was lost or doubled."""
    rng = random.Random(seed)
    path, site = make_site(folder / "killed", days=DAYS, step_s=300.0)
    ref_folder = folder / "reference"
    shutil.copytree(path.parent, ref_folder)
    ref_site = load_site(ref_folder / "site.toml")
    end = datetime.now(UTC).replace(hour=0, minute=0, second=0, microsecond=0)
    start = end - timedelta(days=DAYS)
    span = [f"--from={start:%Y-%m-%d}", f"--to={end:%Y-%m-%d}"]
    day = f"{end - timedelta(days=1):%Y-%m-%d}"

    def steps(cfg: Path) -> list[list[str]]:
        return [["ingest", str(cfg)],
                ["analyze", str(cfg), *span, "--jobs", "1", "--quiet"],
                ["analyze", str(cfg), *span, "--jobs", "2", "--quiet"],
                ["report", str(cfg), "--date", day],
                ["run", str(cfg), "--for", "40"]]

    durations = [timed(args, folder / "reference.log") for args in steps(ref_folder /
                                                                          "site.toml")]
    share = [0.25, 0.2, 0.2, 0.15, 0.2]
    per = [max(1, round(total * s)) for s in share]
    sent = survived = 0
    t0 = time.monotonic()
    for args, n, took in zip(steps(path), per, durations, strict=True):
        log = run_killed(args, kills=n, rng=rng, span_s=max(took, 3.0),
                         out=folder / "killed.log", min_s=1.0)
        sent += log.kills
        survived += log.kills if log.last_rc == 0 else 0
        print(f"  {args[0]:<8}{' '.join(a for a in args[2:] if a.startswith('--j')):<8} "
              f"{log.kills} kills at {log.at_s} s (run takes {took:.0f} s); restart exit "
              f"{log.last_rc}")
    print(f"kills: {sent} sent, {survived} survived (restart ran to its end), "
          f"{time.monotonic() - t0:.0f} s")
    lo, hi = start - timedelta(days=1), end + timedelta(days=1)
    c = store_counts(site, path.parent / "inbox", lo, hi)
    r = store_counts(ref_site, ref_folder / "inbox", lo, hi)
    for name, got, want in (("readings", c.readings, r.readings), ("fits", c.fits, r.fits),
                            ("findings", c.findings, r.findings),
                            ("alarms", c.alarms, r.alarms), ("journal", c.journal, r.journal)):
        print(f"  {name:<9} killed {got:>7}  unkilled {want:>7}")
    print(f"  reports   killed {c.reports}  unkilled {r.reports}")
    print(f"  against the export files: {c.missing} lost, {c.reading_doubles} doubled, "
          f"{c.value_mismatch} changed, {c.extra} not in any file")
    bad = problems(c, fits_expected=r.fits)
    if c.reports != r.reports:
        bad.append(f"reports {c.reports} != {r.reports}")
    if c.findings != r.findings or c.alarms != r.alarms:
        bad.append("findings or alarms differ from the unkilled run")
    print("  problems:", bad or "none")
    return not bad and survived == sent


def outage(folder: Path, kind: str, minutes: float) -> bool:
    """The store's server stopped for *minutes* under the daemon; True when ridden out."""
    try:
        server = PrivatePostgres() if kind == "postgresql" else PrivateMariaDB()
    except (RuntimeError, OSError) as exc:
        print(f"{kind}: a private server cannot be started here ({exc}); skipped")
        return True
    try:
        run = daemon_outage(server, folder / kind, outage_s=minutes * 60, before_s=40.0,
                            after_s=90.0)
    finally:
        server.remove()
    c = run.counts
    print(f"{kind}: store stopped {run.outage_s / 60:.1f} min under the daemon; daemon "
          f"{'stayed up' if run.daemon_alive else 'EXITED'} (exit {run.daemon_rc} on SIGTERM)")
    print(f"  ingest runs {run.health.get('runs', {}).get('ingest', 0)}, failed "
          f"{run.health.get('failures', {}).get('ingest', 0)} (logged {run.failed_runs_logged})")
    print(f"  readings: {c.readings} stored, {c.missing} lost, {c.reading_doubles} doubled, "
          f"{c.value_mismatch} changed")
    bad = problems(c)
    print("  problems:", bad or "none")
    return run.daemon_alive and not bad and c.readings > 0


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--kills", type=int, default=24)
    p.add_argument("--outage-min", type=float, default=10.0)
    p.add_argument("--servers", default="postgresql,mariadb")
    p.add_argument("--seed", type=int, default=9)
    p.add_argument("--folder", type=Path)
    args = p.parse_args()
    folder = args.folder or Path(tempfile.mkdtemp(prefix="bw-faults-"))
    folder.mkdir(parents=True, exist_ok=True)
    print(f"fault injection; work folder {folder}")
    ok = True
    if args.kills > 0:
        ok &= kills(folder / "kills", args.kills, args.seed)
    if args.outage_min > 0:
        for kind in filter(None, args.servers.split(",")):
            ok &= outage(folder, kind, args.outage_min)
    print("goals:", "met" if ok else "MISSED")
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
