"""SIGKILLs at seeded random points of ingest, analyze (--jobs 1 and 2), report and the
daemon's jobs (run), each followed by a restart of the same command (issue 9 part 2).

After every kill and restart the store must hold every good row of the export files once
(read from the CSV text with pandas alone, `harness.expected_keys`), one fit per branch
and window, no doubled finding or alarm, no alarm-journal entry that repeats the state
before it, one report file for the day and no temporary file left behind. The long form
(20+ kills) is `benchmarks/faults.py`.
"""

from __future__ import annotations

import random
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from tests.faults.harness import make_site, problems, run_killed, store_counts

DAYS = 3


@pytest.mark.slow
def test_killed_commands_lose_and_double_nothing(tmp_path: Path) -> None:
    rng = random.Random(20260902)  # seeded: the same kill points on every run
    path, site = make_site(tmp_path / "site", days=DAYS, step_s=300.0)
    end = datetime.now(UTC).replace(hour=0, minute=0, second=0, microsecond=0)
    start = end - timedelta(days=DAYS)
    cfg = str(path)
    span = f"--from={start:%Y-%m-%d}", f"--to={end:%Y-%m-%d}"
    out = tmp_path / "commands.log"
    steps = [
        (["ingest", cfg], 12.0),
        (["analyze", cfg, *span, "--jobs", "1", "--quiet"], 12.0),
        (["analyze", cfg, *span, "--jobs", "2", "--quiet"], 12.0),
        (["report", cfg, "--date", f"{end - timedelta(days=1):%Y-%m-%d}"], 12.0),
        (["run", cfg, "--for", "30"], 25.0),
    ]
    kills = 0
    for args, kill_span in steps:
        done = run_killed(args, kills=1, rng=rng, span_s=kill_span, out=out, min_s=3.0)
        kills += done.kills
        # the restart ran to its end: a killed run left nothing that stops the next one
        assert done.last_rc == 0, (args, done.output[-2000:])
    # most draws land inside the work; a command that finishes within its first seconds
    # (a second ingest with nothing new) may outrun all three of its draws
    assert kills >= 2, kills

    c = store_counts(site, path.parent / "inbox", start - timedelta(days=1),
                     end + timedelta(days=1))
    # every good exported reading stored exactly once, with its value (issue 9 part 2)
    assert c.readings > 0
    # one fit per branch and daily window: 6 branches (config/example-site.toml) x 3 days
    assert problems(c, fits_expected=len(site.branches) * DAYS) == []
    # one morning report for the day reported (write_report names it by the day)
    assert c.reports == (f"morning-{end - timedelta(days=1):%Y-%m-%d}.html",)
    report = (site.report_folder / c.reports[0]).read_text(encoding="utf-8")
    assert report.rstrip().endswith("</html>")  # whole, not cut by a kill
