"""The ledger: the tool's state database (runs, alert lifecycle, outbox), SQLAlchemy Core.

Any SQLAlchemy URL works; a plain path means an SQLite file. ``Ledger.open`` creates or
upgrades the schema (tables and migrations: :mod:`digest.ledger_db`; the outbox API:
:mod:`digest.outbox`, reached as ``ledger.outbox``). The clock is always passed in
(``now``, time-zone aware, stored as UTC) and never read here.

Alert lifecycle, keyed by (check, unit, period), see :meth:`Ledger.record_alerts`::

    unseen key failing          -> new
    new/open, still failing     -> open
    acknowledged, still failing -> acknowledged   (no reminders)
    resolved, failing again     -> open, reopened_at = now, notified_at cleared, so the next
                                   digest carries it again (reason "reopened")
    new/open/acknowledged, its check evaluated for its level and period, not failing
                                -> resolved

Only one process should write at a time: daemons hold :meth:`Ledger.lock`, and the crash
recovery calls (:meth:`Ledger.mark_abandoned_runs`, ``outbox.recover_sending``) are only
safe under it.
"""

from __future__ import annotations

import json
import math
import os
import re
from collections.abc import Iterable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from digest.ledger_db import (
    ALERTS,
    RECIPIENT_STATE,
    RUNS,
    LedgerError,
    LockHeld,
    NotFound,
    UTCDateTime,
    chunks,
    hold_lock,
    lock_key,
    make_engine,
    migrate,
    schema_version,
    transaction,
    upsert,
    utc,
)
from digest.outbox import Outbox

if TYPE_CHECKING:
    from digest.config import Config

__all__ = [
    "AlertRecord",
    "Ledger",
    "LedgerError",
    "LockHeld",
    "NotFound",
    "RunRecord",
    "due_for_digest",
    "evaluated_scope",
    "utc",
]

RunStatus = Literal["running", "succeeded", "failed"]
AlertState = Literal["new", "open", "resolved", "acknowledged"]
SEVERITY_ORDER = ("critical", "warning", "notice")
UNRESOLVED = ("new", "open", "acknowledged")
KEY = ("check", "unit", "period")
_TEXT = ("kind", "unit_name", "level", "severity", "programme", "detail")
_NUMBERS = ("value", "expected", "low", "high")


# ---- records --------------------------------------------------------------------------------


@dataclass(frozen=True)
class RunRecord:
    id: str
    scheduled_for: datetime | None
    started_at: datetime
    finished_at: datetime | None
    status: RunStatus
    period: str | None
    dry_run: bool
    stage_times: dict[str, float]
    counts: dict[str, int]
    error: str | None


@dataclass(frozen=True)
class AlertRecord:
    id: int
    check: str
    unit: str
    period: str
    kind: str
    unit_name: str | None
    level: str
    severity: str
    programme: str
    detail: str | None
    value: float | None
    expected: float | None
    low: float | None
    high: float | None
    state: AlertState
    first_seen_at: datetime
    last_seen_at: datetime
    first_run: str
    last_run: str
    notified_at: datetime | None
    resolved_at: datetime | None
    reopened_at: datetime | None
    acknowledged_at: datetime | None
    ack_note: str | None


def _run_record(row: Mapping[str, Any]) -> RunRecord:
    values = dict(row)
    for name in ("stage_times", "counts"):
        values[name] = json.loads(values[name]) if values[name] else {}
    return RunRecord(**values)


def evaluated_scope(config: Config, period: str) -> set[tuple[str, str, str]]:
    """Every (check, level, period) a run of ``config`` evaluates: pass it to record_alerts."""
    return {(check.name, level, period) for check in config.check for level in check.levels}


# ---- the ledger -------------------------------------------------------------------------------


class Ledger:
    """The state database. Open with :meth:`open`; use as a context manager to close it."""

    def __init__(self, engine: Engine, *, schema: str | None = None) -> None:
        """Use :meth:`open`. ``schema`` is the PostgreSQL schema ``engine`` works in."""
        self.engine = engine
        self.schema = schema
        self.url = engine.url.render_as_string(hide_password=True)
        self.outbox = Outbox(engine)
        self._memory_locks: set[str] = set()

    @classmethod
    def open(cls, url: str | Path, *, schema: str | None = None) -> Ledger:
        """Connect, then create or upgrade the schema. ``schema``: a PostgreSQL schema to use."""
        ledger = cls(make_engine(url, schema), schema=schema)
        try:
            with ledger._write() as conn:
                migrate(conn, schema, ledger.url)
        except sa.exc.OperationalError as exc:
            ledger.close()
            raise LedgerError(f"cannot open the ledger {ledger.url}: {exc.orig}") from exc
        except BaseException:
            ledger.close()
            raise
        return ledger

    def close(self) -> None:
        self.engine.dispose()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Ledger({self.url!r})"

    def _write(self) -> Any:
        return transaction(self.engine, write=True)

    def _read(self) -> Any:
        return transaction(self.engine)

    def schema_version(self) -> int:
        with self._read() as conn:
            return schema_version(conn)

    # ---- runs ------------------------------------------------------------------------------

    def start_run(
        self,
        run_id: str,
        now: datetime,
        scheduled_for: datetime | None = None,
        dry_run: bool = False,
    ) -> bool:
        """Record a run as 'running'. False when ``scheduled_for`` already has a run that is
        running or succeeded (a double fire of the slot): the caller then skips the run."""
        row = {
            "id": run_id,
            "scheduled_for": None if scheduled_for is None else utc(scheduled_for, "scheduled_for"),
            "started_at": utc(now),
            "status": "running",
            "dry_run": bool(dry_run),
        }
        try:
            with self._write() as conn:
                if conn.execute(sa.select(RUNS.c.id).where(RUNS.c.id == run_id)).first():
                    raise LedgerError(f"run id {run_id!r} is already in the ledger {self.url}")
                conn.execute(sa.insert(RUNS).values(row))
        except sa.exc.IntegrityError:  # runs_one_per_slot: the slot is taken
            return False
        return True

    def finish_run(
        self,
        run_id: str,
        now: datetime,
        status: Literal["succeeded", "failed"],
        period: str | None,
        stage_times: Mapping[str, float],
        counts: Mapping[str, int],
        error: str | None = None,
    ) -> None:
        """Record how a run ended: stage timings in seconds, counts (rows read, alerts ...)."""
        if status not in ("succeeded", "failed"):
            raise ValueError(f"status must be 'succeeded' or 'failed', not {status!r}")
        values = {
            "finished_at": utc(now),
            "status": status,
            "period": period,
            "stage_times": json.dumps(dict(stage_times), sort_keys=True),
            "counts": json.dumps(dict(counts), sort_keys=True),
            "error": error,
        }
        try:
            with self._write() as conn:
                done = conn.execute(sa.update(RUNS).where(RUNS.c.id == run_id).values(values))
                if not done.rowcount:
                    raise NotFound(f"no run {run_id!r} in the ledger {self.url}")
        except sa.exc.IntegrityError:  # only after mark_abandoned_runs without the lock
            raise LedgerError(
                f"run {run_id!r}: its scheduled slot already has another successful run"
            ) from None

    def last_runs(self, n: int = 10) -> list[RunRecord]:
        """The ``n`` most recently started runs, newest first."""
        query = sa.select(RUNS).order_by(RUNS.c.started_at.desc(), RUNS.c.id.desc()).limit(n)
        with self._read() as conn:
            return [_run_record(row) for row in conn.execute(query).mappings()]

    def last_scheduled_run(self) -> datetime | None:
        """The latest ``scheduled_for`` of any run (whatever its status), or None."""
        with self._read() as conn:
            return conn.execute(sa.select(sa.func.max(RUNS.c.scheduled_for))).scalar()

    def mark_abandoned_runs(self, now: datetime) -> list[str]:
        """Runs left 'running' by a crashed process become 'failed' ('interrupted').
        Call it only while holding :meth:`lock`, at daemon start; returns their ids."""
        with self._write() as conn:
            ids = list(conn.scalars(sa.select(RUNS.c.id).where(RUNS.c.status == "running")))
            conn.execute(
                sa.update(RUNS)
                .where(RUNS.c.id.in_(ids))
                .values(status="failed", finished_at=utc(now), error="interrupted")
            )
        return ids

    # ---- alerts ----------------------------------------------------------------------------

    def record_alerts(
        self,
        run_id: str,
        now: datetime,
        alerts: pd.DataFrame,
        evaluated: Iterable[tuple[str, str, str]],
    ) -> pd.DataFrame:
        """Upsert this run's alerts and resolve those that stopped failing; one transaction.

        ``alerts`` has the evaluate columns (at least check, unit, period, kind, level,
        severity, programme). ``evaluated`` lists the (check, level, period) triples the run
        actually evaluated (see :func:`evaluated_scope`): only alerts in that scope can be
        resolved, so a night that evaluates a new period leaves older periods alone.
        Returns ``alerts`` with ``alert_id``, ``state``, ``first_seen_at``, ``notified_at``
        and ``reopened_at`` added. Recording the same run twice changes no state.
        """
        now = utc(now)
        rows = _alert_rows(alerts)
        scope = {(str(c), str(lv), str(p)) for c, lv, p in evaluated}
        periods = sorted({r["period"] for r in rows} | {p for _, _, p in scope})
        columns = [ALERTS.c[n] for n in ("id", *KEY, "level", "state", "last_run")]
        columns += [ALERTS.c.notified_at, ALERTS.c.reopened_at]
        known = ALERTS.c.period.in_(sa.bindparam("periods", expanding=True))
        with self._write() as conn:
            existing = {
                (r.check, r.unit, r.period): r
                for r in conn.execute(sa.select(*columns).where(known), {"periods": periods})
            }
            inserts, updates = [], []
            for row in rows:
                old = existing.get((row["check"], row["unit"], row["period"]))
                if old is None:
                    first = {"first_seen_at": now, "first_run": run_id, "state": "new"}
                    inserts.append({**row, **first, "last_seen_at": now, "last_run": run_id})
                else:
                    changed = {k: v for k, v in row.items() if k not in KEY}
                    updates.append({**changed, **_still_failing(old, run_id, now), "b_id": old.id})
            failing = {(r["check"], r["unit"], r["period"]) for r in rows}
            resolve = [
                {"b_id": old.id}
                for key, old in existing.items()
                if key not in failing
                and old.state in UNRESOLVED
                and (old.check, old.level, old.period) in scope
            ]
            by_id = ALERTS.c.id == sa.bindparam("b_id")
            if inserts:
                conn.execute(sa.insert(ALERTS), inserts)
            if updates:  # executemany: SET takes the columns named in the parameter dicts
                conn.execute(sa.update(ALERTS).where(by_id), updates)
            if resolve:
                conn.execute(
                    sa.update(ALERTS).where(by_id).values(state="resolved", resolved_at=now),
                    resolve,
                )
            wanted = [
                ALERTS.c[n]
                for n in ("id", *KEY, "state", "first_seen_at", "notified_at", "reopened_at")
            ]
            stored = {
                (r.check, r.unit, r.period): r
                for r in conn.execute(sa.select(*wanted).where(known), {"periods": periods})
            }
        found = [stored[(r["check"], r["unit"], r["period"])] for r in rows]
        out = alerts.copy()
        out["alert_id"] = np.array([r.id for r in found], dtype=np.int64)
        out["state"] = [r.state for r in found]
        for name in ("first_seen_at", "notified_at", "reopened_at"):
            out[name] = _times([getattr(r, name) for r in found], out.index)
        return out

    def mark_notified(self, alert_ids: Iterable[int], now: datetime) -> int:
        """Record that these alerts went into a digest now; returns how many were updated."""
        now, ids, total = utc(now), sorted({int(i) for i in alert_ids}), 0
        with self._write() as conn:
            for chunk in chunks(ids):
                stmt = sa.update(ALERTS).where(ALERTS.c.id.in_(chunk)).values(notified_at=now)
                total += conn.execute(stmt).rowcount
        return total

    def acknowledge(self, alert_id: int, now: datetime, note: str | None = None) -> AlertRecord:
        """``digest ack ALERT_ID --note``: no more reminders for this alert. A resolved alert
        keeps its state (the note is recorded); unknown ids raise :class:`NotFound`."""
        values: dict[str, Any] = {"acknowledged_at": utc(now), "ack_note": note}
        with self._write() as conn:
            state = conn.execute(sa.select(ALERTS.c.state).where(ALERTS.c.id == alert_id)).scalar()
            if state is None:
                raise NotFound(
                    f"no alert with ALERT_ID {alert_id} in the ledger {self.url}; "
                    "the digest email shows each alert's id"
                )
            if state != "resolved":
                values["state"] = "acknowledged"
            conn.execute(sa.update(ALERTS).where(ALERTS.c.id == alert_id).values(values))
            row = conn.execute(sa.select(ALERTS).where(ALERTS.c.id == alert_id)).mappings().one()
        return AlertRecord(**row)

    def alert(self, alert_id: int) -> AlertRecord:
        """One alert by ALERT_ID; :class:`NotFound` if there is none."""
        with self._read() as conn:
            row = conn.execute(sa.select(ALERTS).where(ALERTS.c.id == alert_id)).mappings().first()
        if row is None:
            raise NotFound(f"no alert with ALERT_ID {alert_id} in the ledger {self.url}")
        return AlertRecord(**row)

    def resolved_between(
        self, since: datetime, now: datetime, notified_only: bool = True
    ) -> pd.DataFrame:
        """Alerts resolved in (since, now] and still resolved, as a frame with ``alert_id``:
        the "resolved since your last digest" list. By default only alerts that were in some
        digest (an alert that came and went between two digests was never announced)."""
        query = (
            sa.select(ALERTS)
            .where(ALERTS.c.state == "resolved")
            .where(ALERTS.c.resolved_at > utc(since, "since"), ALERTS.c.resolved_at <= utc(now))
            .order_by(ALERTS.c.resolved_at, ALERTS.c.id)
        )
        if notified_only:
            query = query.where(ALERTS.c.notified_at.is_not(None))
        with self._read() as conn:
            rows = conn.execute(query).all()
        frame = pd.DataFrame(rows, columns=[c.name for c in ALERTS.c])
        for column in ALERTS.c:
            if isinstance(column.type, UTCDateTime):
                frame[column.name] = _times(frame[column.name], frame.index)
            elif column.name in _NUMBERS:
                frame[column.name] = frame[column.name].astype(float)
        return frame.rename(columns={"id": "alert_id"})

    def open_alerts_by_severity(self) -> dict[str, dict[str, int]]:
        """Unresolved alerts counted by severity (worst first) and state, for ``digest status``."""
        query = (
            sa.select(ALERTS.c.severity, ALERTS.c.state, sa.func.count())
            .where(ALERTS.c.state.in_(UNRESOLVED))
            .group_by(ALERTS.c.severity, ALERTS.c.state)
        )
        with self._read() as conn:
            rows = conn.execute(query).all()
        rank = {s: i for i, s in enumerate(SEVERITY_ORDER)}
        counts: dict[str, dict[str, int]] = {}
        for severity, state, n in sorted(rows, key=lambda r: (rank.get(r[0], 99), r[0])):
            counts.setdefault(severity, dict.fromkeys(UNRESOLVED, 0))[state] = int(n)
        return counts

    # ---- recipients --------------------------------------------------------------------------

    def last_digest_at(self, email: str) -> datetime | None:
        """When ``email`` last got a digest (None: never)."""
        query = sa.select(RECIPIENT_STATE.c.last_digest_at).where(RECIPIENT_STATE.c.email == email)
        with self._read() as conn:
            return conn.execute(query).scalar()

    def set_last_digest(self, email: str, now: datetime) -> None:
        with self._write() as conn:
            upsert(conn, RECIPIENT_STATE, {"email": email, "last_digest_at": utc(now)}, "email")

    # ---- single instance -----------------------------------------------------------------------

    @contextmanager
    def lock(self, name: str = "ledger") -> Iterator[None]:
        """Hold the ledger's lock ``name`` for the block, or raise :class:`LockHeld` at once.

        SQLite: ``flock`` on ``<db>.lock`` (``<db>.<name>.lock`` for other names), holding
        our pid. PostgreSQL: ``pg_try_advisory_lock`` on a dedicated connection whose
        application_name carries our pid. Either is released if the process dies.
        """
        if not re.fullmatch(r"[A-Za-z0-9_-]{1,64}", name):
            raise ValueError(f"lock name {name!r}: use letters, digits, _ and -")
        database = self.engine.url.database or ""
        if self.engine.dialect.name == "sqlite" and (
            database in ("", ":memory:") or database.startswith("file:")
        ):
            cm = self._memory_lock(name)
        else:
            cm = hold_lock(self.engine, self.url, lock_key(self.schema, name), name)
        with cm:
            yield

    @contextmanager
    def _memory_lock(self, name: str) -> Iterator[None]:
        if name in self._memory_locks:  # an in-memory database lives in one process only
            raise LockHeld(self.url, os.getpid())
        self._memory_locks.add(name)
        try:
            yield
        finally:
            self._memory_locks.discard(name)


def _still_failing(old: Any, run_id: str, now: datetime) -> dict[str, Any]:
    """New values for a stored alert that fails again in run ``run_id``."""
    state, notified_at, reopened_at = old.state, old.notified_at, old.reopened_at
    if old.last_run != run_id:  # recording the same run again changes nothing
        if state == "resolved":  # failing again: a fresh notification, marked as reopened
            state, notified_at, reopened_at = "open", None, now
        elif state == "new":
            state = "open"
    return {
        "state": state,
        "notified_at": notified_at,
        "reopened_at": reopened_at,
        "resolved_at": None,
        "last_seen_at": now,
        "last_run": run_id,
    }


def _alert_rows(alerts: pd.DataFrame) -> list[dict[str, Any]]:
    """The stored columns of each alert as plain Python values (NaN -> None)."""
    required = (*KEY, "kind", "level", "severity", "programme")
    missing = [c for c in required if c not in alerts.columns]
    if missing:
        raise ValueError(f"alerts frame lacks column(s) {', '.join(missing)}")
    frame = alerts.reindex(columns=[*KEY, *_TEXT, *_NUMBERS])
    columns: dict[str, list[Any]] = {}
    for name in (*KEY, *_TEXT):
        columns[name] = [None if _missing(v) else str(v) for v in frame[name].tolist()]
    for name in _NUMBERS:
        columns[name] = [None if _missing(v) else float(v) for v in frame[name].tolist()]
    rows = [
        dict(zip(columns, values, strict=True)) for values in zip(*columns.values(), strict=True)
    ]
    keys = [(r["check"], r["unit"], r["period"]) for r in rows]
    if len(set(keys)) != len(keys):
        raise ValueError("alerts frame has more than one row for the same (check, unit, period)")
    return rows


def _times(values: Iterable[datetime | None] | pd.Series, index: pd.Index) -> pd.Series:
    """UTC timestamps (NaT for None) at one resolution, whatever the values are."""
    if not isinstance(values, pd.Series):
        values = pd.Series(list(values), index=index, dtype=object)
    return pd.to_datetime(values, utc=True).astype("datetime64[us, UTC]")


def _missing(value: Any) -> bool:
    return value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value))


def due_for_digest(
    alerts: pd.DataFrame, now: datetime, remind_every_days: float = 7.0
) -> pd.DataFrame:
    """The alerts that go into tonight's digests, with a ``reason`` column (pure function).

    ``alerts`` is what :meth:`Ledger.record_alerts` returned. Due: new or open alerts never
    notified (reason 'new', or 'reopened' after a resolution) and open ones last notified at
    least ``remind_every_days`` ago ('reminder'). Acknowledged and resolved ones never are.
    """
    now = utc(now)
    if alerts.empty:
        return alerts.assign(reason=pd.Series(dtype=object))
    notified = pd.to_datetime(alerts["notified_at"], utc=True)
    reopened = pd.to_datetime(
        alerts.get("reopened_at", pd.Series(pd.NaT, index=alerts.index)), utc=True
    )
    active = alerts["state"].isin(["new", "open"]).to_numpy()
    never = notified.isna().to_numpy()
    stale = (notified <= now - timedelta(days=remind_every_days)).to_numpy()
    reason = np.select(
        [never & reopened.notna().to_numpy(), never, stale], ["reopened", "new", "reminder"], ""
    )
    due = active & (never | stale)
    return alerts[due].assign(reason=reason[due].astype(object))
