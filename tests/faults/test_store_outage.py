"""The results store's database server stopped while the daemon runs (issue 9 part 2).

A PRIVATE server (PostgreSQL by initdb + pg_ctl, MariaDB by mariadb-install-db +
mariadbd) in a temp folder on a free loopback port — the machine's shared servers are
never stopped. `branchwatch run` (ingest every 10 s) works against it while an exporter
drops a file every few seconds; the server is stopped for 40 s and started again. Then:
the daemon never exited, ingest runs failed while the store was away and were counted and
logged, and every exported reading is stored once (the catch-up filled the gap). The long
form (10 minutes) is `benchmarks/faults.py --outage-min 10`.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from tests.faults.harness import PrivateMariaDB, PrivatePostgres, daemon_outage, problems

OUTAGE_S = 40.0


def _server(kind: str) -> Any:
    factory: Callable[[], Any] = PrivatePostgres if kind == "postgresql" else PrivateMariaDB
    try:
        return factory()
    except (RuntimeError, OSError) as exc:  # no server binaries here: say why
        pytest.skip(f"a private {kind} server cannot be started here: {exc}")


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["postgresql", "mariadb"])
def test_daemon_rides_out_a_stopped_store(kind: str, tmp_path: Path) -> None:
    server = _server(kind)
    try:
        run = daemon_outage(server, tmp_path, outage_s=OUTAGE_S, before_s=30.0,
                            after_s=45.0)
    finally:
        server.remove()
    tail = run.log_text[-3000:]
    assert run.daemon_alive, tail  # the daemon did not exit while its store was away
    assert run.daemon_rc == 0, tail  # and stopped cleanly on SIGTERM afterwards
    assert run.outage_s >= OUTAGE_S - 1
    # ingest runs failed during the outage (10 s interval, 40 s away: several), each
    # counted in the heartbeat and logged (monitor.app.daemon.Daemon._count)
    assert run.health["failures"].get("ingest", 0) >= 2, run.health
    assert run.failed_runs_logged >= 2, tail
    assert run.health["runs"]["ingest"] > run.health["failures"]["ingest"]  # and recovered
    # nothing lost, nothing doubled: every exported reading stored once (issue 9 part 2)
    assert run.counts.readings > 0
    assert problems(run.counts) == [], tail
