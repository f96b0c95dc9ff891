"""The results store's bookkeeping of the daemon: job runs and watermarks.

``job_runs`` (job, started), and how far readings, cursors, fits and jobs have got (for
``status``).
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import datetime
from typing import Any

import pandas as pd
import sqlalchemy as sa

from adapters.base import ResultsStore
from adapters.credentials import mask_secrets
from adapters.migrations.dialects import time_text, to_utc_index, upsert
from adapters.migrations.tables import (
    cursors_t,
    fits_t,
    job_runs_t,
    readings_t,
    utc_datetime,
)
from adapters.store_transactions import StoreTransactions, checked_name

#: What `SqlStore.watermarks` returns (defined with the interface).
Watermarks = ResultsStore.Watermarks


class RunTables(StoreTransactions):
    """``job_runs`` and the watermarks of every table ``status`` shows."""

    def record_job_run(
        self,
        job: str,
        started: datetime,
        finished: datetime | None,
        status: str,
        detail: Mapping[str, Any] | None = None,
    ) -> None:
        """Record a job run; the same (job, started) again replaces it (e.g. when it ends).

        Text in *detail* is masked (`mask_secrets`): an error message that quotes a URL
        must not leave a password in the table.
        """
        row = {
            "job": checked_name(job, "job", 100),
            "started": utc_datetime(started, "started"),
            "finished": None if finished is None else utc_datetime(finished, "finished"),
            "status": checked_name(status, "status", 20),
            "detail": _masked(dict(detail or {})),
        }
        with self._write() as conn:
            upsert(conn, job_runs_t, [row], ("job", "started"), replace=True)

    def job_runs(self, limit: int = 20, job: str | None = None) -> pd.DataFrame:
        """The newest *limit* job runs (of one *job* or all), newest first."""
        if limit < 1:
            raise ValueError(f"limit must be at least 1, got {limit}")
        query = sa.select(job_runs_t).order_by(job_runs_t.c.started.desc()).limit(limit)
        if job is not None:
            query = query.where(job_runs_t.c.job == job)
        frame = self._frame(query, job_runs_t)
        if "detail" in frame.columns:  # rows written before masking existed
            frame["detail"] = [_masked(d) for d in frame["detail"]]
        return frame

    def watermarks(self) -> Watermarks:
        """How far readings, cursors, fits and jobs have got (for ``status``)."""
        raw_last = time_text(sa.func.max(readings_t.c.time), self.dialect)
        with self._read() as conn:
            last = conn.execute(
                sa.select(readings_t.c.tag, raw_last)
                .group_by(readings_t.c.tag)
                .order_by(readings_t.c.tag)
            ).all()
        readings = pd.DataFrame(
            {
                "tag": pd.Series([r[0] for r in last], dtype=object),
                "last": to_utc_index([r[1] for r in last]),
            }
        )
        cur = self._frame(
            sa.select(cursors_t.c.source, cursors_t.c.key, cursors_t.c.updated).order_by(
                cursors_t.c.source, cursors_t.c.key
            ),
            cursors_t,
        )
        last_fit = sa.func.max(fits_t.c.window_end).label("last_window_end")
        fits = self._frame(
            sa.select(fits_t.c.branch, last_fit)
            .group_by(fits_t.c.branch)
            .order_by(fits_t.c.branch),
            fits_t,
            extra_times=("last_window_end",),
        )
        newest = (
            sa.select(job_runs_t.c.job, sa.func.max(job_runs_t.c.started).label("s"))
            .group_by(job_runs_t.c.job)
            .subquery()
        )
        jobs = self._frame(
            sa.select(
                job_runs_t.c.job, job_runs_t.c.started.label("last_started"), job_runs_t.c.status
            )
            .join(
                newest,
                sa.and_(newest.c.job == job_runs_t.c.job, newest.c.s == job_runs_t.c.started),
            )
            .order_by(job_runs_t.c.job),
            job_runs_t,
            extra_times=("last_started",),
        )
        return Watermarks(readings=readings, cursors=cur, fits=fits, jobs=jobs)


def _masked(value: Any) -> Any:
    """*value* (JSON-like) with every string passed through `mask_secrets`."""
    if isinstance(value, str):
        return mask_secrets(value)
    if isinstance(value, Mapping):
        return {k: _masked(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_masked(v) for v in value]
    return value
