"""The outbox: rendered messages kept in the ledger until the relay accepts them.

A message enters with :meth:`Outbox.enqueue` (status ``pending``) before the relay is
contacted, and a sender moves it along::

    pending --claim--> sending --mark_sent--> sent
                          |--mark_retry--> pending (next_attempt_at = now + backoff)
                          |--mark_failed--> failed (permanent; requeue puts it back)
    pending, queued longer than max_age --give_up_expired--> failed (caller raises an alarm)
    sending left by a crashed process --recover_sending--> pending

``claim`` is one conditional UPDATE (``... WHERE status = 'pending'``), so of two processes
only one gets a message. Duplicate risk: a crash after the relay accepted a message but
before ``mark_sent`` leaves it 'sending'; ``recover_sending`` puts it back and it is sent a
second time. The stored bytes, and so the Message-ID, are the same on every try, so the
duplicate is recognisable. The window is one SMTP transaction per crash.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, replace
from datetime import datetime, timedelta
from typing import Any, Literal

import sqlalchemy as sa
from sqlalchemy.engine import Engine

from digest.ledger_db import (
    OUTBOX,
    LedgerError,
    NotFound,
    chunks,
    dialect_insert,
    transaction,
    utc,
)

Kind = Literal["digest", "alarm", "summary"]
Status = Literal["pending", "sending", "sent", "failed"]
STATUSES: tuple[Status, ...] = ("pending", "sending", "sent", "failed")
BASE_DELAY = timedelta(minutes=5)
MAX_DELAY = timedelta(hours=4)
MAX_AGE = timedelta(days=3)
INTERRUPTED = "interrupted while sending; the relay may have accepted it (possible duplicate)"


@dataclass(frozen=True)
class NewMessage:
    """A rendered message to enqueue. ``id`` is stable, e.g. f"{run_id}:{kind}:{recipient}";
    ``message`` is the full RFC 5322 bytes with CRLF line ends and its Message-ID header."""

    id: str
    run_id: str
    kind: Kind
    recipient: str
    message_id: str
    subject: str
    message: bytes


@dataclass(frozen=True)
class OutboxItem:
    """A stored message. ``message`` is None when listed without bodies (:meth:`Outbox.list`)."""

    id: str
    run_id: str
    kind: Kind
    recipient: str
    message_id: str
    subject: str
    message: bytes | None
    status: Status
    attempts: int
    created_at: datetime
    queued_at: datetime
    next_attempt_at: datetime
    last_attempt_at: datetime | None
    sent_at: datetime | None
    last_error: str | None
    last_code: int | None


@dataclass(frozen=True)
class Backoff:
    """Retry delays: ``base`` after the first failed try, doubling, never more than ``cap``."""

    base: timedelta = BASE_DELAY
    cap: timedelta = MAX_DELAY


@dataclass(frozen=True)
class OutboxDepth:
    counts: dict[str, int]  # every status, zero included
    oldest_pending: datetime | None  # created_at of the oldest pending message


def next_delay(
    attempts: int, base: timedelta = BASE_DELAY, cap: timedelta = MAX_DELAY
) -> timedelta:
    """Wait after ``attempts`` failed tries: base, 2·base, 4·base ... at most ``cap``."""
    factor = 2 ** min(max(attempts, 1) - 1, 62)
    if base > cap / factor:  # base · factor is past the cap (and might overflow timedelta)
        return cap
    return min(base * factor, cap)


_LIST_COLUMNS = [c for c in OUTBOX.c if c.name != "message"]


def _item(row: Any) -> OutboxItem:
    values = dict(row._mapping)
    values.setdefault("message", None)
    return OutboxItem(**values)


class Outbox:
    """The outbox table of one ledger (``ledger.outbox``)."""

    def __init__(self, engine: Engine) -> None:
        self._engine = engine

    def enqueue(self, items: Iterable[NewMessage], now: datetime) -> dict[str, bool]:
        """Insert messages as 'pending' in ONE transaction. Idempotent: an id already in the
        outbox is left as it is. Returns id -> True if inserted now, False if it existed."""
        now = utc(now)
        rows = [
            {
                **vars(item),
                "status": "pending",
                "attempts": 0,
                "created_at": now,
                "queued_at": now,
                "next_attempt_at": now,
            }
            for item in items
        ]
        ids = [row["id"] for row in rows]
        if not all(isinstance(row["message"], bytes) for row in rows):
            raise TypeError("NewMessage.message must be the RFC 5322 bytes (msg.as_bytes(...))")
        if len(set(ids)) != len(ids):
            raise ValueError("enqueue got the same outbox id twice in one call")
        with transaction(self._engine, write=True) as conn:
            existing: set[str] = set()
            for chunk in chunks(ids):
                existing.update(conn.scalars(sa.select(OUTBOX.c.id).where(OUTBOX.c.id.in_(chunk))))
            fresh = [row for row in rows if row["id"] not in existing]
            if fresh:
                stmt = dialect_insert(conn, OUTBOX)
                if hasattr(stmt, "on_conflict_do_nothing"):  # a concurrent enqueue wins quietly
                    stmt = stmt.on_conflict_do_nothing(index_elements=["id"])
                conn.execute(stmt, fresh)
        return {i: i not in existing for i in ids}

    def due(self, now: datetime, limit: int = 100) -> list[OutboxItem]:
        """Pending messages whose next attempt is due, oldest first, with their bytes."""
        query = (
            sa.select(OUTBOX)
            .where(OUTBOX.c.status == "pending", OUTBOX.c.next_attempt_at <= utc(now))
            .order_by(OUTBOX.c.created_at, OUTBOX.c.id)
            .limit(limit)
        )
        with transaction(self._engine) as conn:
            return [_item(row) for row in conn.execute(query)]

    def claim(self, item_id: str, now: datetime) -> bool:
        """Atomically pending -> sending (counting an attempt). False: someone else has it,
        or it is not pending. Only the process that got True may send the message."""
        stmt = (
            sa.update(OUTBOX)
            .where(OUTBOX.c.id == item_id, OUTBOX.c.status == "pending")
            .values(status="sending", attempts=OUTBOX.c.attempts + 1, last_attempt_at=utc(now))
        )
        with transaction(self._engine, write=True) as conn:
            return conn.execute(stmt).rowcount == 1

    def mark_sent(self, item_id: str, now: datetime, code: int | None = 250) -> None:
        """The relay accepted the message (reply ``code``)."""
        self._set(item_id, status="sent", sent_at=utc(now), last_code=code, last_error=None)

    def mark_retry(
        self,
        item_id: str,
        now: datetime,
        error: str,
        code: int | None = None,
        backoff: Backoff = Backoff(),
    ) -> datetime:
        """A temporary failure: back to 'pending', due again after :func:`next_delay`.
        Returns the time of the next attempt."""
        now = utc(now)
        with transaction(self._engine, write=True) as conn:
            attempts = conn.execute(
                sa.select(OUTBOX.c.attempts).where(OUTBOX.c.id == item_id)
            ).scalar()
            if attempts is None:
                raise NotFound(f"no outbox message {item_id!r}")
            when = now + next_delay(attempts, backoff.base, backoff.cap)
            conn.execute(
                sa.update(OUTBOX)
                .where(OUTBOX.c.id == item_id)
                .values(status="pending", next_attempt_at=when, last_error=error, last_code=code)
            )
        return when

    def mark_failed(self, item_id: str, now: datetime, error: str, code: int | None = None) -> None:
        """A permanent failure (or given up): 'failed' until someone requeues it."""
        utc(now)
        self._set(item_id, status="failed", last_error=error, last_code=code)

    def give_up_expired(self, now: datetime, max_age: timedelta = MAX_AGE) -> list[OutboxItem]:
        """Messages pending for longer than ``max_age`` since they were queued become
        'failed'; they are returned so that the caller can raise an alarm."""
        cutoff = utc(now) - max_age
        query = sa.select(*_LIST_COLUMNS).where(
            OUTBOX.c.status == "pending", OUTBOX.c.queued_at <= cutoff
        )
        with transaction(self._engine, write=True) as conn:
            expired = [_item(row) for row in conn.execute(query)]
            given_up = [
                replace(
                    item,
                    status="failed",
                    last_error=f"gave up after {item.attempts} attempt(s) over {max_age}: "
                    f"{item.last_error or 'never attempted'}",
                )
                for item in expired
            ]
            if given_up:
                conn.execute(
                    sa.update(OUTBOX).where(OUTBOX.c.id == sa.bindparam("b_id")),
                    [
                        {"b_id": i.id, "status": "failed", "last_error": i.last_error}
                        for i in given_up
                    ],
                )
        return given_up

    def recover_sending(self, now: datetime) -> list[OutboxItem]:
        """Messages left 'sending' by a crashed process go back to 'pending', due now.
        Call it only while holding the ledger lock. Each may reach its recipient twice (see
        the module docstring); the returned items let the caller log their Message-IDs."""
        now = utc(now)
        query = sa.select(*_LIST_COLUMNS).where(OUTBOX.c.status == "sending")
        with transaction(self._engine, write=True) as conn:
            stuck = [_item(row) for row in conn.execute(query)]
            ids = [item.id for item in stuck]
            conn.execute(
                sa.update(OUTBOX)
                .where(OUTBOX.c.id.in_(ids))
                .values(status="pending", next_attempt_at=now, last_error=INTERRUPTED)
            )
        return [
            replace(i, status="pending", next_attempt_at=now, last_error=INTERRUPTED) for i in stuck
        ]

    def requeue(self, item_id: str, now: datetime) -> OutboxItem:
        """``digest outbox --retry ID``: a failed (or waiting) message is due now, attempts
        reset. A message being sent, or already sent, is refused."""
        now = utc(now)
        with transaction(self._engine, write=True) as conn:
            item = self._get(conn, item_id)
            if item.status == "sent":
                raise LedgerError(
                    f"outbox message {item_id!r} was accepted by the relay at "
                    f"{item.sent_at:%Y-%m-%d %H:%M} UTC; sending it again would duplicate it"
                )
            if item.status == "sending":
                raise LedgerError(
                    f"outbox message {item_id!r} is being sent right now; if no digest process "
                    "is running, restart the daemon, which puts it back in the queue"
                )
            values = {"status": "pending", "attempts": 0, "queued_at": now, "next_attempt_at": now}
            conn.execute(sa.update(OUTBOX).where(OUTBOX.c.id == item_id).values(values))
            return replace(item, **values)

    def get(self, item_id: str) -> OutboxItem:
        """One message with its bytes; :class:`NotFound` if there is none."""
        with transaction(self._engine) as conn:
            return self._get(conn, item_id)

    def depth(self) -> OutboxDepth:
        """How many messages in each status, and when the oldest pending one was created."""
        with transaction(self._engine) as conn:
            rows = conn.execute(
                sa.select(OUTBOX.c.status, sa.func.count()).group_by(OUTBOX.c.status)
            ).all()
            oldest = conn.execute(
                sa.select(sa.func.min(OUTBOX.c.created_at)).where(OUTBOX.c.status == "pending")
            ).scalar()
        counts = dict.fromkeys(STATUSES, 0)
        counts.update({status: int(n) for status, n in rows})
        return OutboxDepth(counts, oldest)

    def _get(self, conn: sa.Connection, item_id: str) -> OutboxItem:
        row = conn.execute(sa.select(OUTBOX).where(OUTBOX.c.id == item_id)).first()
        if row is None:
            raise NotFound(f"no outbox message {item_id!r}; `digest outbox` lists them")
        return _item(row)

    def _set(self, item_id: str, **values: Any) -> None:
        with transaction(self._engine, write=True) as conn:
            if not conn.execute(
                sa.update(OUTBOX).where(OUTBOX.c.id == item_id).values(values)
            ).rowcount:
                raise NotFound(f"no outbox message {item_id!r}")

    # Defined last: inside this class body the name ``list`` is the method from here on.
    def list(self, status: Status | None = None, limit: int = 1000) -> list[OutboxItem]:
        """Messages (without their bytes), oldest first, optionally of one status."""
        query = sa.select(*_LIST_COLUMNS).order_by(OUTBOX.c.created_at, OUTBOX.c.id).limit(limit)
        if status is not None:
            query = query.where(OUTBOX.c.status == status)
        with transaction(self._engine) as conn:
            return [_item(row) for row in conn.execute(query)]
