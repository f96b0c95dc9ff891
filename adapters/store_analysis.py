"""The results store's analysis results: fits and windows, data health, findings.

``fits`` (branch, window_start, window_end) · ``window_checks`` · ``header_balance`` ·
``data_health`` (tag, day, flag) · ``findings`` (branch, kind, start).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from datetime import UTC, date, datetime
from typing import Any

import pandas as pd
import sqlalchemy as sa

from adapters.fit_record import FIT_COLUMNS, FIT_FLOATS, WindowFit
from adapters.migrations.dialects import num, time_text, to_utc_index, upsert
from adapters.migrations.tables import (
    FINDING_COLUMNS,
    data_health_t,
    findings_t,
    fits_t,
    header_balance_t,
    utc_datetime,
    window_checks_t,
)
from adapters.store_transactions import StoreTransactions, full_record


class AnalysisTables(StoreTransactions):
    """What the analysis and the diagnosis write: fits, window checks, header balance,
    data health and findings."""

    # fits and findings ---------------------------------------------------------------
    def upsert_fits(self, fits: Iterable[WindowFit]) -> int:
        """Store fit results, one per (branch, window_start, window_end), replacing any.

        ``computed_at`` defaults to now; NaN numbers are stored as NULL. Returns the rows
        written.
        """
        out = _fit_records(fits)
        with self._write() as conn:
            upsert(conn, fits_t, out, ("branch", "window_start", "window_end"), replace=True)
        return len(out)

    def store_window(
        self,
        *,
        fits: Iterable[WindowFit],
        screening: pd.DataFrame,
        balance: Mapping[str, Any] | None,
        health: pd.DataFrame,
    ) -> None:
        """Everything one analysis window produced, in one transaction.

        *fits* as in `upsert_fits`; *screening* with columns branch, window_start,
        window_end, tag, frozen, out_of_range, spikes, samples; *balance* with
        window_start, window_end, residual_m3s, uncertainty_m3s, samples (or None);
        *health* as in `add_data_health`. Rows on the same natural keys are replaced.
        """
        fit_rows = _fit_records(fits)
        checks = [
            {
                "branch": str(b), "window_start": utc_datetime(ws, "window_start"),
                "window_end": utc_datetime(we, "window_end"), "tag": str(t),
                "frozen": int(fr), "out_of_range": int(oor), "spikes": int(sp),
                "samples": int(n),
            }
            for b, ws, we, t, fr, oor, sp, n in zip(
                screening["branch"], screening["window_start"], screening["window_end"],
                screening["tag"], screening["frozen"], screening["out_of_range"],
                screening["spikes"], screening["samples"], strict=True,
            )
        ]
        health_rows = _health_records(health)
        with self._write() as conn:
            upsert(conn, fits_t, fit_rows, ("branch", "window_start", "window_end"),
                   replace=True)
            if checks:
                upsert(conn, window_checks_t, checks,
                       ("branch", "window_start", "window_end", "tag"), replace=True)
            if balance is not None:
                row = full_record(balance, tuple(c.name for c in header_balance_t.columns),
                              ("window_start", "window_end"), "balance")
                upsert(conn, header_balance_t, [row], ("window_start", "window_end"),
                       replace=True)
            if health_rows:
                upsert(conn, data_health_t, health_rows, ("tag", "day", "flag"), replace=True)

    def read_screening(
        self, start: datetime | None = None, end: datetime | None = None
    ) -> pd.DataFrame:
        """Screening counts per window and tag, windows starting in ``[start, end)``."""
        t = window_checks_t
        query = sa.select(t).order_by(t.c.window_start, t.c.branch, t.c.tag)
        if start is not None:
            query = query.where(t.c.window_start >= utc_datetime(start, "start"))
        if end is not None:
            query = query.where(t.c.window_start < utc_datetime(end, "end"))
        return self._frame(query, t)

    def read_balance(
        self, start: datetime | None = None, end: datetime | None = None
    ) -> pd.DataFrame:
        """Header mass balance per window, windows starting in ``[start, end)``."""
        t = header_balance_t
        query = sa.select(t).order_by(t.c.window_start)
        if start is not None:
            query = query.where(t.c.window_start >= utc_datetime(start, "start"))
        if end is not None:
            query = query.where(t.c.window_start < utc_datetime(end, "end"))
        return self._frame(query, t)

    def newest_fit_end(self) -> datetime | None:
        """The end of the newest analysed window of any branch (UTC), None when none:
        one aggregate on the fits' key, not a per-tag scan of the readings."""
        with self._read() as conn:
            raw = conn.execute(
                sa.select(time_text(sa.func.max(fits_t.c.window_end), self.dialect))
            ).scalar()
        if raw is None:
            return None
        return pd.Timestamp(to_utc_index([raw])[0]).to_pydatetime()

    def read_fits(
        self,
        branch: str | None = None,
        start: datetime | None = None,
        end: datetime | None = None,
    ) -> pd.DataFrame:
        """Fits of one branch or all, windows starting in ``[start, end)``, oldest first."""
        query = sa.select(fits_t).order_by(fits_t.c.branch, fits_t.c.window_start)
        if branch is not None:
            query = query.where(fits_t.c.branch == branch)
        if start is not None:
            query = query.where(fits_t.c.window_start >= utc_datetime(start, "start"))
        if end is not None:
            query = query.where(fits_t.c.window_start < utc_datetime(end, "end"))
        return self._frame(query, fits_t)

    def upsert_findings(self, rows: Iterable[Mapping[str, Any]]) -> int:
        """Store findings keyed on (branch, kind, start), replacing any stored one.

        Keys as in `FINDING_COLUMNS` (DESIGN §5): ``end`` may be None (still open),
        ``evidence`` a mapping of numbers; ``updated`` defaults to now.
        """
        now = datetime.now(UTC)
        out = []
        for row in rows:
            rec = full_record(
                row,
                FINDING_COLUMNS,
                ("branch", "kind", "start", "detected", "confidence", "message"),
                "finding",
            )
            rec["confidence"] = float(rec["confidence"])
            if not 0.0 <= rec["confidence"] <= 1.0:
                raise ValueError(f"finding confidence must be in [0, 1], got {rec['confidence']}")
            rec["evidence"] = dict(rec["evidence"] or {})
            rec["updated"] = rec.get("updated") or now
            out.append(rec)
        with self._write() as conn:
            upsert(conn, findings_t, out, ("branch", "kind", "start"), replace=True)
        return len(out)

    def read_findings(
        self,
        branch: str | None = None,
        *,
        kind: str | None = None,
        since: datetime | None = None,
        open_only: bool = False,
    ) -> pd.DataFrame:
        """Findings (of a branch, of a kind, detected at or after *since*, still open)."""
        query = sa.select(findings_t).order_by(findings_t.c.detected, findings_t.c.branch)
        if branch is not None:
            query = query.where(findings_t.c.branch == branch)
        if kind is not None:
            query = query.where(findings_t.c.kind == kind)
        if since is not None:
            query = query.where(findings_t.c.detected >= utc_datetime(since, "since"))
        if open_only:
            query = query.where(findings_t.c.end.is_(None))
        return self._frame(query, findings_t)

    # data health ---------------------------------------------------------------------
    def add_data_health(self, frame: pd.DataFrame) -> int:
        """Store screening counts (columns tag, day, flag, count); a stored day is replaced.

        ``day`` is the UTC day (a date, or a timestamp at UTC midnight).
        """
        missing = {"tag", "day", "flag", "count"} - set(frame.columns)
        if missing:
            raise ValueError(f"frame lacks data-health columns {sorted(missing)}")
        rows = _health_records(frame)
        with self._write() as conn:
            upsert(conn, data_health_t, rows, ("tag", "day", "flag"), replace=True)
        return len(rows)

    def data_health(self, start: datetime, end: datetime) -> pd.DataFrame:
        """Counts of UTC days in ``[start, end)``: tag, day (UTC midnight), flag, count."""
        lo, hi = utc_datetime(start, "start").date(), utc_datetime(end, "end")
        query = (
            sa.select(data_health_t)
            .where(data_health_t.c.day >= lo, data_health_t.c.day < _ceil_day(hi))
            .order_by(data_health_t.c.day, data_health_t.c.tag, data_health_t.c.flag)
        )
        out = self._frame(query, data_health_t)
        out["day"] = pd.to_datetime(out["day"]).dt.tz_localize("UTC").dt.as_unit("ns")
        out["count"] = out["count"].astype("int64")
        return out


def _ceil_day(t: datetime) -> date:
    """The first UTC day that starts at or after *t*."""
    return pd.Timestamp(t).ceil("D").date()


def _fit_records(fits: Iterable[WindowFit]) -> list[dict[str, Any]]:
    now = datetime.now(UTC)
    out = []
    for fit in fits:
        if not isinstance(fit, WindowFit):
            raise TypeError(f"a fit must be an adapters.fit_record.WindowFit, got "
                            f"{type(fit).__name__}")
        rec = full_record(
            fit.to_row(), FIT_COLUMNS,
            ("branch", "window_start", "window_end", "samples", "status"), "fit",
        )
        rec["computed_at"] = rec.get("computed_at") or now
        for col in FIT_FLOATS:
            rec[col] = num(rec[col])
        if rec["identifiable"] is not None:
            rec["identifiable"] = bool(rec["identifiable"])
        rec["samples"] = int(rec["samples"])
        out.append(rec)
    return out


def _health_records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    if frame.empty:
        return []
    missing = {"tag", "day", "flag", "count"} - set(frame.columns)
    if missing:
        raise ValueError(f"frame lacks data-health columns {sorted(missing)}")
    days = pd.to_datetime(frame["day"], utc=True).dt.date
    return [
        {"tag": t, "day": d, "flag": f, "count": int(n)}
        for t, d, f, n in zip(frame["tag"], days, frame["flag"], frame["count"], strict=True)
    ]
