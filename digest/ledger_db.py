"""The ledger's database plumbing: tables, schema migrations, engines, transactions, locks.

Any SQLAlchemy URL works; a plain path means an SQLite file. :func:`migrate` creates the
schema or upgrades it: ``MIGRATIONS`` is an ordered list, entry ``i`` takes the schema from
version ``i`` to ``i + 1``, and ``meta.schema_version`` records how far a database got.
Times are stored in UTC (:class:`UTCDateTime`); a naive datetime is refused.

SQLite runs in WAL mode with a 30 s busy timeout, and every write transaction starts with
``BEGIN IMMEDIATE``, so two writers queue up instead of failing half-way through.

Single-instance locks (:func:`hold_lock`): on SQLite an exclusive ``flock`` on a file next
to the database that holds the holder's pid; on PostgreSQL ``pg_try_advisory_lock`` on a
dedicated connection whose application_name carries the pid. The kernel or the server
releases either when the holding process dies.
"""

from __future__ import annotations

import fcntl
import hashlib
import os
import re
import socket
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Connection, Engine

from digest.errors import DigestError


class LedgerError(DigestError):
    """The ledger cannot do what was asked; the message says why and what to do."""


class NotFound(LedgerError):
    """An id given on the command line is not in the ledger."""

    exit_code = 2


class LockHeld(LedgerError):
    """Another process holds the ledger's lock."""

    def __init__(self, url: str, pid: int | None, host: str | None = None) -> None:
        self.url, self.pid, self.host = url, pid, host
        who = "pid unknown" if pid is None else f"pid {pid}"
        if host and host != socket.gethostname():
            who += f" on {host}"
        super().__init__(f"another digest process ({who}) holds the ledger {url}; stop it first")


def utc(moment: datetime, name: str = "now") -> datetime:
    """``moment`` in UTC; a naive datetime is refused (the ledger never guesses a zone)."""
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise ValueError(f"{name} must be time-zone aware, e.g. datetime.now(UTC); got {moment!r}")
    return moment.astimezone(UTC)


class UTCDateTime(sa.types.TypeDecorator[datetime]):
    """Aware datetimes in, aware UTC datetimes out; naive UTC text on SQLite."""

    impl = sa.DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: sa.Dialect) -> datetime | None:
        if value is None:
            return None
        value = utc(value, "a timestamp")
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value: datetime | None, dialect: sa.Dialect) -> datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


# ---- schema -------------------------------------------------------------------------------

METADATA = sa.MetaData()
Col, Text, Str, When = sa.Column, sa.Text, sa.String, UTCDateTime


def _check_in(column: str, values: Iterable[str]) -> sa.CheckConstraint:
    listed = ", ".join(f"'{v}'" for v in values)
    return sa.CheckConstraint(f"{column} IN ({listed})", name=f"{column}_known")


META = sa.Table(
    "meta", METADATA, Col("key", Str(64), primary_key=True), Col("value", Text, nullable=False)
)
RUNS = sa.Table(
    "runs",
    METADATA,
    Col("id", Str(64), primary_key=True),
    Col("scheduled_for", When),
    Col("started_at", When, nullable=False),
    Col("finished_at", When),
    Col("status", Str(16), nullable=False),
    Col("period", Str(16)),
    Col("dry_run", sa.Boolean, nullable=False),
    Col("stage_times", Text),
    Col("counts", Text),
    Col("error", Text),
    _check_in("status", ("running", "succeeded", "failed")),
)
# A scheduled slot has at most one run that is running or succeeded (a double fire loses).
sa.Index(
    "runs_one_per_slot",
    RUNS.c.scheduled_for,
    unique=True,
    sqlite_where=sa.text("status IN ('running', 'succeeded')"),
    postgresql_where=sa.text("status IN ('running', 'succeeded')"),
)
sa.Index("runs_started_at", RUNS.c.started_at)
ALERTS = sa.Table(
    "alerts",
    METADATA,
    Col("id", sa.Integer, primary_key=True, autoincrement=True),
    Col("check", Str(128), nullable=False),
    Col("unit", Str(128), nullable=False),
    Col("period", Str(16), nullable=False),
    Col("kind", Str(16), nullable=False),
    Col("unit_name", Text),
    Col("level", Str(64), nullable=False),
    Col("severity", Str(16), nullable=False),
    Col("programme", Str(64), nullable=False),
    Col("detail", Text),
    *(Col(name, sa.Float) for name in ("value", "expected", "low", "high")),
    Col("state", Str(16), nullable=False),
    Col("first_seen_at", When, nullable=False),
    Col("last_seen_at", When, nullable=False),
    Col("first_run", Str(64), nullable=False),
    Col("last_run", Str(64), nullable=False),
    Col("notified_at", When),
    Col("resolved_at", When),
    Col("reopened_at", When),
    Col("acknowledged_at", When),
    Col("ack_note", Text),
    sa.UniqueConstraint("check", "unit", "period", name="alerts_key"),
    _check_in("state", ("new", "open", "resolved", "acknowledged")),
    sqlite_autoincrement=True,  # ALERT_IDs are never reused
)
sa.Index("alerts_period", ALERTS.c.period)
sa.Index("alerts_state", ALERTS.c.state)
sa.Index("alerts_resolved_at", ALERTS.c.resolved_at)
RECIPIENT_STATE = sa.Table(
    "recipient_state",
    METADATA,
    Col("email", Str(320), primary_key=True),
    Col("last_digest_at", When, nullable=False),
)
OUTBOX = sa.Table(
    "outbox",
    METADATA,
    Col("id", Str(512), primary_key=True),
    Col("run_id", Str(64), nullable=False),
    Col("kind", Str(16), nullable=False),
    Col("recipient", Str(320), nullable=False),
    Col("message_id", Str(998), nullable=False),
    Col("subject", Text, nullable=False),
    Col("message", sa.LargeBinary, nullable=False),
    Col("status", Str(16), nullable=False),
    Col("attempts", sa.Integer, nullable=False),
    Col("created_at", When, nullable=False),
    Col("queued_at", When, nullable=False),  # entered 'pending' (enqueue or requeue)
    Col("next_attempt_at", When, nullable=False),
    Col("last_attempt_at", When),
    Col("sent_at", When),
    Col("last_error", Text),
    Col("last_code", sa.Integer),
    _check_in("kind", ("digest", "alarm", "summary")),
    _check_in("status", ("pending", "sending", "sent", "failed")),
)
sa.Index("outbox_due", OUTBOX.c.status, OUTBOX.c.next_attempt_at)

Migration = Callable[[Connection], None]


def _v1_initial(conn: Connection) -> None:
    # Version 1 is the current METADATA. Once a version 2 changes a table, give this step
    # its own frozen copy of the version-1 tables, so old databases replay history exactly.
    METADATA.create_all(conn)


MIGRATIONS: list[Migration] = [_v1_initial]


# ---- connections --------------------------------------------------------------------------


def make_engine(url: str | Path, schema: str | None = None) -> Engine:
    """An engine for ``url``; a path (no ``://``) is an SQLite file, folders created.
    ``schema``: a PostgreSQL schema to keep the tables in (the connections' search_path)."""
    if isinstance(url, Path) or "://" not in url:
        url = sa.URL.create("sqlite", database=str(url))
    parsed = sa.make_url(url)
    shown = parsed.render_as_string(hide_password=True)
    if schema is not None and not re.fullmatch(r"[a-z_][a-z0-9_]{0,62}", schema):
        raise LedgerError(f"ledger schema {schema!r}: use lower-case letters, digits and _")
    if parsed.get_backend_name() != "postgresql" and schema is not None:
        raise LedgerError(f"ledger {shown}: a schema can only be given for PostgreSQL")
    if parsed.get_backend_name() != "sqlite":
        args = {} if schema is None else {"options": f"-csearch_path={schema}"}
        try:
            return sa.create_engine(parsed, pool_pre_ping=True, connect_args=args)
        except ModuleNotFoundError as exc:
            raise LedgerError(
                f"ledger {shown}: the database driver {exc.name!r} is not installed "
                "(for PostgreSQL: pip install 'psycopg[binary]')"
            ) from None
    database = parsed.database or ""
    on_disk = database not in ("", ":memory:") and not database.startswith("file:")
    if on_disk:
        Path(database).parent.mkdir(parents=True, exist_ok=True)
    engine = sa.create_engine(parsed, connect_args={"timeout": 30.0})

    @sa.event.listens_for(engine, "connect")
    def _connect(dbapi_connection: Any, _record: Any) -> None:
        dbapi_connection.isolation_level = None  # we issue BEGIN ourselves (below)
        if on_disk:
            dbapi_connection.execute("PRAGMA journal_mode=WAL")

    @sa.event.listens_for(engine, "begin")
    def _begin(conn: Connection) -> None:
        write = conn.get_execution_options().get("ledger_write", False)
        conn.exec_driver_sql("BEGIN IMMEDIATE" if write else "BEGIN")

    return engine


@contextmanager
def transaction(engine: Engine, *, write: bool = False) -> Iterator[Connection]:
    """One transaction; ``write`` takes SQLite's write lock up front (BEGIN IMMEDIATE)."""
    with engine.connect() as conn:
        conn.execution_options(ledger_write=write)
        with conn.begin():
            yield conn


def dialect_insert(conn: Connection, table: sa.Table) -> Any:
    """INSERT with ON CONFLICT support on SQLite and PostgreSQL (plain INSERT elsewhere)."""
    name = conn.dialect.name
    if name == "sqlite":
        from sqlalchemy.dialects.sqlite import insert
    elif name == "postgresql":
        from sqlalchemy.dialects.postgresql import insert
    else:
        return sa.insert(table)
    return insert(table)


def upsert(conn: Connection, table: sa.Table, values: dict[str, Any], key: str) -> None:
    stmt = dialect_insert(conn, table)
    if hasattr(stmt, "on_conflict_do_update"):
        changes = {k: v for k, v in values.items() if k != key}
        conn.execute(stmt.values(values).on_conflict_do_update(index_elements=[key], set_=changes))
    elif not conn.execute(
        sa.update(table).where(table.c[key] == values[key]).values(values)
    ).rowcount:
        conn.execute(sa.insert(table).values(values))


def chunks(items: list[Any], size: int = 500) -> Iterator[list[Any]]:
    for start in range(0, len(items), size):
        yield items[start : start + size]


def lock_key(schema: str | None, name: str) -> int:
    """A stable signed 64-bit key for pg_advisory_lock (Python's hash() is salted)."""
    digest = hashlib.sha256(f"digest:{schema or ''}:{name}".encode()).digest()
    return int.from_bytes(digest[:8], "big", signed=True)


def schema_version(conn: Connection) -> int:
    """The version recorded in ``meta`` (0: a database digest never set up)."""
    value = conn.execute(sa.select(META.c.value).where(META.c.key == "schema_version")).scalar()
    return 0 if value is None else int(value)


def migrate(conn: Connection, schema: str | None, url: str) -> int:
    """Bring the database behind ``conn`` (in a write transaction) to the newest version."""
    if conn.dialect.name == "postgresql":
        if schema:
            conn.exec_driver_sql(f'CREATE SCHEMA IF NOT EXISTS "{schema}"')
        key = lock_key(schema, "migrate")  # two processes opening at once take turns
        conn.execute(sa.select(sa.func.pg_advisory_xact_lock(key)))
    META.create(conn, checkfirst=True)
    version = schema_version(conn)
    if version > len(MIGRATIONS):
        raise LedgerError(
            f"the ledger {url} has schema version {version}, newer than this digest "
            f"understands ({len(MIGRATIONS)}); upgrade digest"
        )
    for number in range(version, len(MIGRATIONS)):
        MIGRATIONS[number](conn)
        upsert(conn, META, {"key": "schema_version", "value": str(number + 1)}, "key")
    return len(MIGRATIONS)


# ---- single-instance locks ------------------------------------------------------------------


@contextmanager
def hold_lock(engine: Engine, url: str, key: int, name: str) -> Iterator[None]:
    """Hold lock ``name`` (advisory ``key`` on PostgreSQL) or raise :class:`LockHeld`."""
    backend = engine.dialect.name
    if backend == "postgresql":
        cm = _advisory_lock(engine, url, key)
    elif backend == "sqlite":
        suffix = ".lock" if name == "ledger" else f".{name}.lock"
        cm = _file_lock(Path(f"{engine.url.database}{suffix}"), url)
    else:
        raise LedgerError(f"ledger {url}: locks need SQLite or PostgreSQL, not {backend}")
    with cm:
        yield


@contextmanager
def _file_lock(path: Path, url: str) -> Iterator[None]:
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            pid, host = _holder(os.pread(fd, 512, 0).decode("utf-8", "replace"))
            raise LockHeld(url, pid, host) from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"pid {os.getpid()} on {socket.gethostname()}\n".encode(), 0)
        try:
            yield
        finally:
            os.ftruncate(fd, 0)
    finally:
        os.close(fd)  # releases the flock


@contextmanager
def _advisory_lock(engine: Engine, url: str, key: int) -> Iterator[None]:
    conn = engine.connect().execution_options(isolation_level="AUTOCOMMIT")
    try:
        me = f"digest pid {os.getpid()} on {socket.gethostname()}"[:63]
        conn.execute(sa.select(sa.func.set_config("application_name", me, False)))
        if not conn.execute(sa.select(sa.func.pg_try_advisory_lock(key))).scalar():
            pid, host = _holder(conn.execute(_HOLDER, _split_key(key)).scalar() or "")
            raise LockHeld(url, pid, host)
        try:
            yield
        finally:
            conn.execute(sa.select(sa.func.pg_advisory_unlock(key)))
    finally:
        conn.invalidate()  # never hand a connection with our name or lock back to the pool
        conn.close()


_HOLDER = sa.text(
    "SELECT a.application_name FROM pg_locks l JOIN pg_stat_activity a ON a.pid = l.pid "
    "WHERE l.locktype = 'advisory' AND l.granted AND l.objsubid = 1 "
    "AND l.database = (SELECT oid FROM pg_database WHERE datname = current_database()) "
    "AND l.classid::bigint = :hi AND l.objid::bigint = :lo"
)


def _split_key(key: int) -> dict[str, int]:
    # pg_locks shows a bigint key as two unsigned halves: classid (high), objid (low)
    return {"hi": (key >> 32) & 0xFFFFFFFF, "lo": key & 0xFFFFFFFF}


def _holder(text: str) -> tuple[int | None, str | None]:
    match = re.search(r"pid (\d+)(?: on (\S+))?", text)
    return (int(match[1]), match[2]) if match else (None, None)
