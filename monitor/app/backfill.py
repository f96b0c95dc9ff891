"""Many windows read and analysed in window order (`analyze_windows`), in worker processes
when the run is long enough to gain from them: the pool, its workers' start, and their
end with the process that started them.
"""

from __future__ import annotations

import atexit
import ctypes
import logging
import multiprocessing
import os
import pickle
import signal
import sys
import threading
import time
from collections import deque
from collections.abc import Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor
from contextlib import contextmanager
from datetime import datetime
from itertools import islice
from typing import Any

from adapters.base import ReadingsSource, ResultsStore
from monitor.analysis.window import WindowAnalysis, analyze_window
from monitor.app.ingest import open_source, read_window
from monitor.site.config import Site

log = logging.getLogger(__name__)

__all__ = [
    "PARALLEL_AFTER_S",
    "analyze_windows",
    "worker_pool",
]


#: Worker processes start only when the remaining windows would take at least this long
#: in this process, judged by the first window [s]: each worker spends a few seconds on
#: imports before its first window, which a short run never wins back.
PARALLEL_AFTER_S = 10.0


def analyze_windows(
    site: Site,
    store: ResultsStore,
    source: ReadingsSource,
    spans: Sequence[tuple[datetime, datetime]],
    *,
    jobs: int = 1,
    parallel_after_s: float = PARALLEL_AFTER_S,
) -> Iterator[WindowAnalysis]:
    """Read and analyse each window of *spans*, yielding the results in window order.

    With *jobs* > 1, the first window is analysed here and timed; when the rest would
    take longer than *parallel_after_s* at that pace, worker processes do them: each
    opens its own store connection (the store pickles as a way to reopen it; SQL stores
    reopen their URL) and, where the source keeps the readings (SQL), its own source from
    the site file (`open_source`). At most two windows per worker are in flight, so
    memory stays bounded on a long backfill. A store that cannot be reopened elsewhere
    (an in-memory database) is served in this process throughout.

    Results come in window order even when a later window finishes first: the caller
    writes them in that order, so the stored windows of an interrupted run have no holes
    and `catch_up`, which resumes after the last stored window, misses none. An error in
    a window is raised when its turn comes, after every earlier window was yielded.
    """
    rest = list(spans)
    # Workers for two windows or more after the first: one alone would gain nothing.
    shipped = _reopenable(store) if jobs > 1 and len(rest) > 2 else None
    if shipped is not None:
        ws, we = rest.pop(0)
        started = time.perf_counter()
        yield analyze_window(site, read_window(site, store, source, ws, we), ws, we)
        if (time.perf_counter() - started) * len(rest) < parallel_after_s:
            shipped = None
    if shipped is None:
        for ws, we in rest:
            yield analyze_window(site, read_window(site, store, source, ws, we), ws, we)
        return
    yield from _in_workers(site, shipped, source.keeps_readings, rest, min(jobs, len(rest)))


def _in_workers(
    site: Site, shipped: bytes, own_source: bool, spans: Sequence[tuple[datetime, datetime]],
    workers: int,
) -> Iterator[WindowAnalysis]:
    """`analyze_windows` in *workers* processes, results in window order."""
    with worker_pool(site, shipped, own_source, workers) as pool:
        pending: deque[Future[WindowAnalysis]] = deque()
        todo = iter(spans)
        try:
            with _sigint_ignored():  # the workers start on the first submits
                for span in islice(todo, 2 * workers):
                    pending.append(pool.submit(_worker_window, span))
            while pending:
                result = pending.popleft().result()
                for span in islice(todo, 1):
                    pending.append(pool.submit(_worker_window, span))
                yield result
        finally:
            for future in pending:
                future.cancel()


def worker_pool(site: Site, shipped: bytes, own_source: bool, workers: int
                ) -> ProcessPoolExecutor:
    """The process pool of a backfill: *workers* spawned processes, each with the site,
    its own store connection (*shipped*: the pickled store) and, when *own_source*, its
    own source; each exits when this process dies (`_die_with_parent`)."""
    context = multiprocessing.get_context("spawn")  # no inherited connections or threads
    return ProcessPoolExecutor(
        workers, mp_context=context, initializer=_worker_start,
        initargs=(site, shipped, own_source, os.getpid()),
    )


#: prctl option that asks the kernel for a signal when the parent dies (linux/prctl.h).
_PR_SET_PDEATHSIG = 1
#: How often the portable fallback looks for its parent [s].
PARENT_CHECK_S = 1.0


def _die_with_parent(parent_pid: int) -> None:
    """Make this worker end when *parent_pid* (the process that started it) dies.

    A worker outliving its parent (the parent killed with SIGKILL, or crashed) holds its
    memory and a database connection for as long as its last window takes and then idles
    for ever. On Linux the kernel sends SIGKILL at the parent's death
    (``prctl(PR_SET_PDEATHSIG)``); everywhere a daemon thread also checks every second
    that the parent is still this process's parent and exits when it is not. A parent
    already gone before either was set up is caught by the first check.
    """
    if sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            if libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0) != 0:
                log.debug("prctl(PR_SET_PDEATHSIG) failed: errno %d", ctypes.get_errno())
        except (OSError, AttributeError) as exc:
            log.debug("prctl not available (%s): the parent check alone", exc)

    def watch() -> None:
        while True:
            if os.getppid() != parent_pid:
                os._exit(1)  # the parent is gone: nobody will read this worker's results
            time.sleep(PARENT_CHECK_S)

    if os.getppid() != parent_pid:
        os._exit(1)
    threading.Thread(target=watch, name="parent-watch", daemon=True).start()


@contextmanager
def _sigint_ignored() -> Iterator[None]:
    """Processes started inside are born with SIGINT ignored (the setting survives exec).

    Ctrl-C reaches the whole process group: only this process should act on it — stop
    handing out windows and wait for the ones in hand — not the workers, whose
    interrupted imports would print tracebacks and break the pool.
    """
    if threading.current_thread() is not threading.main_thread():
        yield  # signals are the main thread's; the daemon's jobs run elsewhere
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


def _reopenable(store: ResultsStore) -> bytes | None:
    """The store pickled for the workers, or None when it cannot be reopened elsewhere."""
    try:
        return pickle.dumps(store)
    except (TypeError, AttributeError, pickle.PicklingError) as exc:
        log.info("windows analysed in this process: the store cannot be reopened (%s)", exc)
        return None


#: What a worker process works with: set once by `_worker_start`.
_WORKER: dict[str, Any] = {}


def _worker_start(site: Site, store: bytes, own_source: bool, parent_pid: int) -> None:
    _die_with_parent(parent_pid)
    _WORKER["site"] = site
    _WORKER["store"] = opened = pickle.loads(store)
    atexit.register(opened.close)
    # Ingested readings are in the store: no source needed (nor opened) then.
    _WORKER["source"] = source = open_source(site) if own_source else None
    if source is not None:
        atexit.register(source.close)


def _worker_window(span: tuple[datetime, datetime]) -> WindowAnalysis:
    site, store, source = _WORKER["site"], _WORKER["store"], _WORKER["source"]
    ws, we = span
    if source is None:
        readings = store.read_readings(list(site.tags), ws, we)
    else:
        readings = read_window(site, store, source, ws, we)
    return analyze_window(site, readings, ws, we)
