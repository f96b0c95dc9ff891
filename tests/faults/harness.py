"""Fault-injection machinery shared by `tests/faults/` (short form) and
`benchmarks/faults.py` (long form), issue 9 part 2.

* `make_site` — the example site (invented data) with a few days of simulated exports
  that end shortly before now, so that the daemon's own clock finds them recent;
* `expected_keys` — every good reading of the export files, read straight from the CSV
  text with pandas (independent of the ingest code): what the store must hold, once;
* `run_killed` — a CLI command run in a process of its own, SIGKILLed after a seeded
  random delay, then run again until it finishes;
* `store_counts` / `invariants` — what the store and the report folder hold, and every
  doubling or loss found in them;
* `PrivatePostgres` / `PrivateMariaDB` — database servers of this test alone, in a temp
  folder on a free loopback port, that the test may stop and start (the machine's shared
  servers are never touched).
"""

from __future__ import annotations

import contextlib
import itertools
import os
import random
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from adapters.base import open_store
from adapters.units import from_si, to_si
from monitor.app.demo import EXAMPLE_SITE, simulate_site
from monitor.site.config import Site, load_site

ROOT = Path(__file__).resolve().parents[2]
PYTHON = sys.executable


# ---------------------------------------------------------------------------------------
# the site and its exports


def site_text(store_url: str | None = None, *, ingest_every: str | None = None,
              timezone: str = "UTC") -> str:
    """The example site file, in *timezone*, optionally on another store URL."""
    text = EXAMPLE_SITE.read_text(encoding="utf-8")
    text = text.replace('timezone = "Europe/Berlin"', f'timezone = "{timezone}"')
    if store_url:
        text = re.sub(r'(?m)^url = "sqlite:///var/branchwatch.db"', f'url = "{store_url}"', text)
    if ingest_every:
        text = text.replace("[analysis]\n", f'[schedule]\ningest_every = "{ingest_every}"\n\n'
                            "[analysis]\n", 1)
    return text


def make_site(folder: Path, *, days: int, step_s: float, end: datetime | None = None,
              store_url: str | None = None, ingest_every: str | None = None,
              seed: int = 9) -> tuple[Path, Site]:
    """A fresh site folder with *days* of daily exports ending at *end* (default: the last
    UTC midnight); returns the site file and the loaded site."""
    if folder.exists():
        shutil.rmtree(folder)
    (folder / "inbox").mkdir(parents=True)
    path = folder / "site.toml"
    path.write_text(site_text(store_url, ingest_every=ingest_every), encoding="utf-8")
    site = load_site(path)
    end = end or datetime.now(UTC).replace(hour=0, minute=0, second=0, microsecond=0)
    sim = simulate_site(site, end - timedelta(days=days), end, step_s=step_s, seed=seed)
    times = pd.DatetimeIndex(sim.times).tz_localize("UTC")
    frame = pd.DataFrame({t: v for t, v in sim.values.items() if t in site.tags}, index=times)
    for day, part in frame.groupby(times.date):
        export(site, part, folder / "inbox" / f"loopB_{day:%Y%m%d}.csv", spoil=True)
    return path, site


def export(site: Site, frame: pd.DataFrame, path: Path, *, spoil: bool = False) -> None:
    """*frame* (SI, UTC index) as a wide CSV in plant units, settled (mtime an hour ago).

    With *spoil*, three bad lines are added as a historian makes them: a garbled line, a
    repeated row, a text value in a number column.
    """
    out = pd.DataFrame(index=frame.index)
    for tag in frame.columns:
        spec = site.tags[tag]
        out[tag] = np.round(from_si(frame[tag].to_numpy(float), spec.unit, spec.kind), 4)
    out.index = out.index.map(lambda t: t.isoformat())
    out.index.name = "timestamp"
    lines = out.to_csv(na_rep="").splitlines(keepends=True)
    if spoil and len(lines) > 12:
        lines.insert(5, "2026-##-## transmission error\n")
        lines.insert(8, lines[7])
        cells = lines[10].split(",")
        cells[1] = "Bad Input"
        lines[10] = ",".join(cells)
    tmp = path.with_suffix(".part")
    tmp.write_text("".join(lines), encoding="utf-8")
    settled = time.time() - 3600
    os.utime(tmp, (settled, settled))
    tmp.rename(path)  # the exporter's own atomic drop


def expected_keys(site: Site, inbox: Path) -> pd.DataFrame:
    """Every good reading of the CSV files in *inbox*: (tag, time, value in SI), read with
    pandas alone. A cell is good when its row's timestamp parses and the cell is a finite
    number; a row repeated in a file counts once."""
    parts = []
    for path in sorted(inbox.glob("*.csv")):
        raw = pd.read_csv(path, dtype=str, keep_default_na=False)
        when = pd.to_datetime(raw["timestamp"], utc=True, errors="coerce", format="ISO8601")
        for tag in raw.columns[1:]:
            if tag not in site.tags:
                continue
            spec = site.tags[tag]
            value = pd.to_numeric(raw[tag].replace("", np.nan), errors="coerce")
            ok = when.notna() & value.notna() & np.isfinite(value)
            si = to_si(value[ok].to_numpy(float), spec.unit, spec.kind)
            parts.append(pd.DataFrame({"tag": tag, "time": when[ok].to_numpy(), "value": si}))
    frame = pd.concat(parts, ignore_index=True)
    return frame.drop_duplicates(["tag", "time"], keep="last").reset_index(drop=True)


# ---------------------------------------------------------------------------------------
# kills


@dataclass
class KillLog:
    """What `run_killed` did: kills sent (and where in the run), restarts, exit codes."""

    kills: int = 0
    restarts: int = 0
    at_s: list[float] = field(default_factory=list)
    last_rc: int | None = None
    output: str = ""


def cli(args: Sequence[str], *, log_file: Any = subprocess.DEVNULL) -> subprocess.Popen[bytes]:
    """``python -m monitor.app.cli ARGS`` in a process of its own, from the checkout."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.Popen([PYTHON, "-m", "monitor.app.cli", *args], cwd=ROOT, env=env,
                            stdout=log_file, stderr=subprocess.STDOUT)


def run_killed(args: Sequence[str], *, kills: int, rng: random.Random, span_s: float,
               out: Path, timeout_s: float = 600.0, min_s: float = 1.0) -> KillLog:
    """Run the CLI with *args*; SIGKILL it *kills* times, each after a delay drawn from
    *rng* in [*min_s*, *span_s*] (a run that ends first is counted as done and run again
    with a new draw inside the time it took, up to 3 x *kills* starts); then run it once
    more to its end. *out* gets all output."""
    log = KillLog()
    low, high = min_s, span_s
    with out.open("ab") as fh:
        for _ in range(3 * kills):
            if log.kills >= kills:
                break
            delay = rng.uniform(low, high)
            proc = cli(args, log_file=fh)
            t0 = time.monotonic()
            try:
                proc.wait(timeout=delay)
            except subprocess.TimeoutExpired:
                proc.send_signal(signal.SIGKILL)
                proc.wait()
                log.kills += 1
                log.at_s.append(round(delay, 2))
            else:
                # the run ended before its draw (a fast machine, little left to do): the
                # next draws fall inside the time it took, so the kills asked for land
                took = time.monotonic() - t0
                low, high = min(low, 0.2 * took), max(min(high, 0.8 * took), 0.05)
            log.restarts += 1
        proc = cli(args, log_file=fh)
        log.last_rc = proc.wait(timeout=timeout_s)
    log.output = out.read_text(encoding="utf-8", errors="replace")
    return log


def timed(args: Sequence[str], out: Path, timeout_s: float = 600.0) -> float:
    """Run the CLI with *args* to its end; its wall time [s]. Raises on a failed exit."""
    t0 = time.monotonic()
    with out.open("ab") as fh:
        rc = cli(args, log_file=fh).wait(timeout=timeout_s)
    if rc != 0:
        raise RuntimeError(f"{' '.join(args)} exited {rc}; see {out}")
    return time.monotonic() - t0


# ---------------------------------------------------------------------------------------
# what the store holds


@dataclass(frozen=True)
class Counts:
    """What one site's store and report folder hold after a run."""

    readings: int
    reading_doubles: int
    missing: int
    extra: int
    value_mismatch: int
    fits: int
    fit_doubles: int
    findings: int
    finding_doubles: int
    alarms: int
    alarm_doubles: int
    journal: int
    journal_repeats: int
    reports: tuple[str, ...]
    leftover_tmp: tuple[str, ...]


def store_counts(site: Site, inbox: Path, start: datetime, end: datetime) -> Counts:
    """Count readings against the exported files, and doublings in every results table."""
    expected = expected_keys(site, inbox)
    store = open_store(site.store_url)
    try:
        stored = store.read_readings(list(site.tags), start, end)
        fits = store.read_fits()
        findings = store.read_findings()
        alarms = store.read_alarms()
        journal = store.alarm_events()
    finally:
        store.close()
    stored = stored.copy()
    stored["time"] = pd.to_datetime(stored["time"], utc=True)
    expected["time"] = pd.to_datetime(expected["time"], utc=True)
    both = expected.merge(stored.drop_duplicates(["tag", "time"]), on=["tag", "time"],
                          how="outer", suffixes=("_file", "_store"), indicator=True)
    matched = both[both["_merge"] == "both"]
    mismatch = int((~np.isclose(matched["value_file"], matched["value_store"],
                                rtol=1e-9, atol=1e-9)).sum())
    repeats = 0
    if not journal.empty:  # a state change journalled twice in a row is not a change
        for _, grp in journal.groupby(["branch", "condition"], sort=False):
            states = list(grp["to_state"].astype(str))
            repeats += sum(1 for a, b in itertools.pairwise(states) if a == b)
    folder = site.report_folder
    reports = tuple(sorted(p.name for p in folder.glob("morning-*.html"))) \
        if folder.exists() else ()
    tmp = tuple(sorted(p.name for p in folder.glob("*.tmp"))) if folder.exists() else ()
    return Counts(
        readings=len(stored),
        reading_doubles=int(stored.duplicated(["tag", "time"]).sum()),
        missing=int((both["_merge"] == "left_only").sum()),
        extra=int((both["_merge"] == "right_only").sum()),
        value_mismatch=mismatch,
        fits=len(fits),
        fit_doubles=int(fits.duplicated(["branch", "window_start"]).sum()) if len(fits) else 0,
        findings=len(findings),
        finding_doubles=int(findings.duplicated(["branch", "kind", "start"]).sum())
        if len(findings) else 0,
        alarms=len(alarms),
        alarm_doubles=int(alarms.duplicated(["branch", "condition"]).sum()) if len(alarms) else 0,
        journal=len(journal),
        journal_repeats=repeats,
        reports=reports,
        leftover_tmp=tmp,
    )


def problems(c: Counts, *, fits_expected: int | None = None) -> list[str]:
    """Every loss or doubling in *c* (empty: none)."""
    out = []
    for name in ("reading_doubles", "missing", "extra", "value_mismatch", "fit_doubles",
                 "finding_doubles", "alarm_doubles", "journal_repeats"):
        if getattr(c, name):
            out.append(f"{name}={getattr(c, name)}")
    if fits_expected is not None and c.fits != fits_expected:
        out.append(f"fits={c.fits}, expected {fits_expected}")
    if c.leftover_tmp:
        out.append(f"leftover temp files {c.leftover_tmp}")
    return out


# ---------------------------------------------------------------------------------------
# private database servers


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _wait_port(port: int, up: bool, timeout_s: float = 60.0) -> None:
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        with socket.socket() as s:
            s.settimeout(0.5)
            reachable = s.connect_ex(("127.0.0.1", port)) == 0
        if reachable == up:
            return
        time.sleep(0.3)
    raise RuntimeError(f"port {port} did not become {'reachable' if up else 'free'} "
                       f"in {timeout_s:.0f} s")


def _as_user(user: str, argv: list[str]) -> list[str]:
    """*argv* as *user* when this process is root (initdb refuses root)."""
    if os.geteuid() != 0:
        return argv
    runuser = shutil.which("runuser")
    if runuser is None:
        raise RuntimeError("running as root and runuser is missing: cannot drop to "
                           f"{user} for the private server")
    return [runuser, "-u", user, "--", *argv]


class PrivatePostgres:
    """A PostgreSQL cluster of its own (initdb + pg_ctl) in a fresh temp folder (directly
    in the temp dir, so that the postgres user can reach it), trust auth on
    127.0.0.1:*port*; `stop` and `start` take it away and bring it back, `remove` deletes
    it."""

    def __init__(self) -> None:
        bins = sorted(Path("/usr/lib/postgresql").glob("*/bin/pg_ctl"))
        if not bins:
            raise RuntimeError("no pg_ctl under /usr/lib/postgresql/*/bin")
        self.bin = bins[-1].parent
        self.folder = Path(tempfile.mkdtemp(prefix="bw-faults-pg-"))
        self.data = self.folder / "pgdata"
        self.port = free_port()
        self.url = f"postgresql+psycopg://postgres@127.0.0.1:{self.port}/postgres"
        if os.geteuid() == 0:
            shutil.chown(self.folder, "postgres", "postgres")
        self._run([str(self.bin / "initdb"), "-D", str(self.data), "-U", "postgres",
                   "--auth=trust", "-E", "UTF8", "--no-sync"])

    def _run(self, argv: list[str]) -> None:
        done = subprocess.run(_as_user("postgres", argv), capture_output=True, text=True,
                              cwd=self.folder, timeout=120)
        if done.returncode != 0:
            raise RuntimeError(f"{Path(argv[0]).name} failed: {done.stderr.strip()[-400:]}")

    def start(self) -> None:
        opts = (f"-p {self.port} -c listen_addresses=127.0.0.1 "
                f"-c unix_socket_directories={self.folder} -c fsync=off")
        self._run([str(self.bin / "pg_ctl"), "-D", str(self.data), "-l",
                   str(self.folder / "server.log"), "-o", opts, "-w", "start"])
        _wait_port(self.port, True)

    def stop(self) -> None:
        self._run([str(self.bin / "pg_ctl"), "-D", str(self.data), "-m", "fast", "-w", "stop"])
        _wait_port(self.port, False)

    def remove(self) -> None:
        with contextlib.suppress(RuntimeError):
            self.stop()
        shutil.rmtree(self.folder, ignore_errors=True)


class PrivateMariaDB:
    """A MariaDB server of its own (mariadb-install-db + mariadbd) in *folder* on
    127.0.0.1:*port*, without grant tables (loopback only, this test's data alone)."""

    def __init__(self) -> None:
        folder = Path(tempfile.mkdtemp(prefix="bw-faults-mariadb-"))
        install = shutil.which("mariadb-install-db")
        self.server = shutil.which("mariadbd") or "/usr/sbin/mariadbd"
        if install is None or not Path(self.server).exists():
            raise RuntimeError("mariadb-install-db or mariadbd is missing")
        self.folder = folder
        self.data = folder / "data"
        self.port = free_port()
        self.url = f"mysql+pymysql://root@127.0.0.1:{self.port}/bwtest"
        self.proc: subprocess.Popen[bytes] | None = None
        self._log: Any = None
        folder.mkdir(parents=True, exist_ok=True)
        done = subprocess.run(
            [install, "--no-defaults", f"--datadir={self.data}", "--user=root",
             "--auth-root-authentication-method=normal", "--skip-test-db"],
            capture_output=True, text=True, timeout=180)
        if done.returncode != 0:
            raise RuntimeError(f"mariadb-install-db failed: {done.stderr.strip()[-400:]}")
        self._created = False

    def start(self) -> None:
        self._log = log = (self.folder / "server.log").open("ab")
        self.proc = subprocess.Popen(
            [self.server, "--no-defaults", f"--datadir={self.data}", f"--port={self.port}",
             "--bind-address=127.0.0.1", f"--socket={self.folder / 'sock'}",
             f"--pid-file={self.folder / 'pid'}", "--user=root", "--skip-grant-tables",
             "--innodb-flush-log-at-trx-commit=2", "--skip-log-bin"],
            stdout=log, stderr=log)
        _wait_port(self.port, True)
        if not self._created:
            import pymysql

            conn = pymysql.connect(host="127.0.0.1", port=self.port, user="root")
            try:
                with conn.cursor() as cur:
                    cur.execute("CREATE DATABASE IF NOT EXISTS bwtest")
                conn.commit()
            finally:
                conn.close()
            self._created = True

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            self.proc.wait(timeout=120)
        self.proc = None
        if self._log is not None:
            self._log.close()
            self._log = None
        _wait_port(self.port, False)

    def remove(self) -> None:
        self.stop()
        shutil.rmtree(self.folder, ignore_errors=True)


# ---------------------------------------------------------------------------------------
# the daemon against a wall-clock exporter, with the store taken away


@dataclass
class OutageRun:
    """What `daemon_outage` saw."""

    outage_s: float
    daemon_alive: bool
    daemon_rc: int | None
    counts: Counts
    health: dict[str, Any]
    failed_runs_logged: int
    log_text: str


def daemon_outage(server: Any, folder: Path, *, outage_s: float, before_s: float,
                  after_s: float, step_s: float = 5.0) -> OutageRun:
    """`run` (ingest every 10 s) on *server*'s store against an exporter that drops a file
    every ~5 s of wall time; after *before_s* the server is stopped for *outage_s*, then
    started again and the run goes on *after_s* more. The daemon gets SIGTERM at the end."""
    import json

    server.start()
    path, site = make_site(folder / "site", days=1, step_s=60.0, store_url=server.url,
                           ingest_every="10 s")
    for p in (folder / "site" / "inbox").glob("*.csv"):
        p.unlink()  # live data only: the exporter writes it below
    total = before_s + outage_s + after_s
    t0 = datetime.now(UTC).replace(microsecond=0)
    sim = simulate_site(site, t0 - timedelta(minutes=20), t0 + timedelta(seconds=total + 120),
                        step_s=step_s, seed=21)
    times = pd.DatetimeIndex(sim.times).tz_localize("UTC")
    frame = pd.DataFrame({t: v for t, v in sim.values.items() if t in site.tags}, index=times)
    inbox = folder / "site" / "inbox"
    export(site, frame[frame.index <= t0], inbox / "loopB_history.csv")
    last = t0
    log_path = folder / "daemon.log"
    health_file = folder / "health.json"
    with log_path.open("ab") as fh:
        daemon = cli(["--log", "run", str(path), "--health-file", str(health_file)],
                     log_file=fh)
        alive = True
        try:
            start = time.monotonic()
            stopped_at = restarted_at = None
            while (el := time.monotonic() - start) < total:
                now = datetime.now(UTC)
                chunk = frame[(frame.index > last) & (frame.index <= now)]
                if len(chunk):
                    export(site, chunk, inbox / f"loopB_{now:%H%M%S%f}.csv")
                    last = pd.Timestamp(chunk.index[-1]).to_pydatetime()
                if stopped_at is None and el >= before_s:
                    server.stop()
                    stopped_at = time.monotonic()
                if stopped_at is not None and restarted_at is None \
                        and time.monotonic() - stopped_at >= outage_s:
                    server.start()
                    restarted_at = time.monotonic()
                alive = alive and daemon.poll() is None
                time.sleep(3.0)
            time.sleep(25.0)  # the last files settle (settle_seconds) and are ingested
            alive = alive and daemon.poll() is None
        finally:
            if daemon.poll() is None:
                daemon.send_signal(signal.SIGTERM)
            rc = daemon.wait(timeout=300)
    outage = (restarted_at or time.monotonic()) - (stopped_at or time.monotonic())
    health = json.loads(health_file.read_text()) if health_file.exists() else {}
    counts = store_counts(site, inbox, t0 - timedelta(hours=2),
                          t0 + timedelta(seconds=total + 600))
    text = log_path.read_text(encoding="utf-8", errors="replace")
    failed = len(re.findall(r"job ingest failed", text))
    return OutageRun(outage_s=outage, daemon_alive=alive, daemon_rc=rc, counts=counts,
                     health=health, failed_runs_logged=failed, log_text=text)
