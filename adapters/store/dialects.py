"""Everything the store does differently on SQLite and on PostgreSQL, in one place.

The other modules of the store are written once for both backends; what
cannot be (connection set-up, transaction starts, upsert statements, time
values handed to the driver, triggers, locks, driver errors) is here.

SQLite (the default) is tuned in a ``connect`` listener:

- ``journal_mode=WAL``: readers never block the writer, nor it them;
- ``synchronous=NORMAL``: in WAL mode a commit survives a crash of the
  process (SIGKILL included) but the last commits may be lost on power
  failure or an OS crash; pass ``sqlite_synchronous="FULL"`` to also survive
  those, at the cost of one fsync per commit;
- ``busy_timeout``: a writer waits for the lock instead of failing;
- ``foreign_keys=ON``.

SQLite allows one writer at a time, even in WAL mode. A deferred
transaction that reads and then writes gets SQLITE_BUSY at once, whatever
the timeout, when another writer got in between. So every write transaction
begins with ``BEGIN IMMEDIATE`` (the write lock is taken up front, and
waiting for it honours ``busy_timeout``); read transactions use a plain
``BEGIN``. This follows the recipe "Using SQLAlchemy to emit BEGIN in lieu
of SQLite's transaction control" of the SQLAlchemy SQLite dialect docs: the
sqlite3 driver's own transaction control is switched off
(``isolation_level = None``) and a ``begin`` listener emits BEGIN. With the
driver's implicit commits off, DDL is transactional on SQLite too.

PostgreSQL (``postgresql+psycopg://...``) needs none of this: its row locks
and ``INSERT ... ON CONFLICT`` give the same behaviour under READ COMMITTED.
It gets a connect timeout, a pre-ping of pooled connections, and a
transaction-scoped advisory lock while a schema is created or upgraded.
"""

from __future__ import annotations

import sqlite3
import sys
from datetime import datetime, timezone
from typing import Any, Callable

from sqlalchemy import DDL, BigInteger, Connection, Engine, Integer, Table, create_engine, event, text
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.engine import URL, Dialect
from sqlalchemy.exc import SQLAlchemyError

from leadline.detector.errors import StoreError

#: The backends the store runs on (SQLAlchemy backend names).
BACKENDS = ("sqlite", "postgresql")

#: Execution option that marks a connection's next transaction as a write.
WRITE_OPTION = "leadline_write"

SQLITE_SYNCHRONOUS = ("OFF", "NORMAL", "FULL", "EXTRA")

#: A surrogate id: INTEGER PRIMARY KEY (the rowid) on SQLite, BIGINT elsewhere.
SURROGATE_ID = BigInteger().with_variant(Integer(), "sqlite")


# ------------------------------------------------------------------------ URLs
def check_url(parsed: URL, shown: str) -> None:
    """Refuse a backend the store does not run on, and an in-memory SQLite.

    ``shown`` is the URL as it may appear in a message (no password).
    """
    backend = parsed.get_backend_name()
    if backend == "sqlite":
        db = parsed.database or ""
        if db in ("", ":memory:") or "mode=memory" in str(parsed.query):
            raise StoreError(
                "an in-memory SQLite database cannot be used as the event store: "
                "WAL mode and other processes need a file; give a file path"
            )
    elif backend != "postgresql":
        raise StoreError(
            f"unsupported store backend {backend!r} in {shown}; "
            "expected an SQLite file or postgresql+psycopg://"
        )


# --------------------------------------------------------------------- engines
def create_dialect_engine(url: URL, *, busy_timeout_s: float, synchronous: str) -> Engine:
    """A SQLAlchemy engine for ``url`` with the backend's settings (module notes).

    Raises ``SQLAlchemyError`` or ``ImportError``; the caller translates them.
    """
    if url.get_backend_name() == "sqlite":
        engine = create_engine(url, connect_args={"timeout": busy_timeout_s, "check_same_thread": False})
        _install_sqlite_listeners(engine, busy_timeout_ms=int(busy_timeout_s * 1000), synchronous=synchronous)
        return engine
    # fail within a bounded time when the server does not answer
    connect_args = {} if "connect_timeout" in url.query else {"connect_timeout": 10}
    return create_engine(url, pool_pre_ping=True, connect_args=connect_args)


def _install_sqlite_listeners(engine: Engine, *, busy_timeout_ms: int, synchronous: str) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection, connection_record):  # noqa: ANN001 - SQLAlchemy signature
        # Take BEGIN away from the sqlite3 driver; the "begin" listener emits it.
        dbapi_connection.isolation_level = None
        cursor = dbapi_connection.cursor()
        try:
            cursor.execute(f"PRAGMA busy_timeout = {busy_timeout_ms}")
            mode = cursor.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise StoreError(
                    f"SQLite refused WAL mode (journal_mode is {mode!r}); "
                    "the store needs a local file, not a network share"
                )
            cursor.execute(f"PRAGMA synchronous = {synchronous}")
            cursor.execute("PRAGMA foreign_keys = ON")
        finally:
            cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Connection) -> None:
        if conn.get_execution_options().get(WRITE_OPTION, False):
            conn.exec_driver_sql("BEGIN IMMEDIATE")
        else:
            conn.exec_driver_sql("BEGIN")


def driver_errors() -> tuple[type[BaseException], ...]:
    """The exception classes of SQLAlchemy and of the loaded database drivers."""
    # psycopg is imported by SQLAlchemy only for PostgreSQL URLs; if it is
    # not loaded, none of its errors can occur (and SQLite users skip its import).
    errors: tuple[type[BaseException], ...] = (SQLAlchemyError, sqlite3.Error)
    psycopg = sys.modules.get("psycopg")
    return errors + (psycopg.Error,) if psycopg is not None else errors


# --------------------------------------------------------------------- upserts
_INSERTS: dict[str, Callable[..., Any]] = {"sqlite": sqlite.insert, "postgresql": postgresql.insert}


def insert_for(conn: Connection | Dialect) -> Callable[..., Any]:
    """The dialect's ``insert`` (the one with ``on_conflict_do_update``)."""
    dialect = conn.dialect if isinstance(conn, Connection) else conn
    try:
        return _INSERTS[dialect.name]
    except KeyError:
        raise ValueError(f"no upsert for dialect {dialect.name!r}") from None


def insert_plain_rows(conn: Connection, table: Table, columns: tuple[str, ...], rows: list[tuple]) -> None:
    """Insert tuples of plain numbers (no type processing needed); on SQLite by the driver's own
    executemany.

    The journal takes every accepted reading, so its insert is the store's
    busiest statement. On SQLite the driver's executemany over the tuples
    skips SQLAlchemy's per-row parameter processing, which cost more than the
    insert itself: 3.9 against 7.2 us a row. On PostgreSQL SQLAlchemy's own
    batching into multi-row VALUES is the quicker (12.9 us a row against 28.5
    for psycopg's executemany), so ``table.insert()`` stays.
    """
    if conn.dialect.name != "sqlite" or conn.dialect.paramstyle != "qmark":
        conn.execute(table.insert(), [dict(zip(columns, row)) for row in rows])
        return
    quote = conn.dialect.identifier_preparer.quote
    conn.exec_driver_sql(f"INSERT INTO {quote(table.name)} ({', '.join(quote(c) for c in columns)}) "
                         f"VALUES ({', '.join('?' * len(columns))})", rows)


# ------------------------------------------------------------------ time values
def stores_naive_utc(dialect: Dialect) -> bool:
    """True where a time column holds the naive UTC wall time (SQLite has no zone type)."""
    return dialect.name == "sqlite"


def _sqlite_time(t: datetime | None) -> str | None:
    # The text SQLAlchemy's SQLite DATETIME writes: "YYYY-MM-DD HH:MM:SS.ffffff" (UTC).
    if t is None:
        return None
    return t.astimezone(timezone.utc).replace(tzinfo=None).isoformat(" ", "microseconds")


def _pg_time(t: datetime | None) -> datetime | None:
    return None if t is None else t.astimezone(timezone.utc)


def driver_time_for(dialect: Dialect) -> Callable[[datetime | None], Any]:
    """The value of an aware time as the driver takes it, bypassing the column type
    (:class:`~.writer.EventUpsert` binds rows straight on the driver)."""
    return _sqlite_time if dialect.name == "sqlite" else _pg_time


# ----------------------------------------------------------------------- schema
def partial_index_where(condition: str) -> dict[str, Any]:
    """The keyword arguments of an ``Index`` restricted to rows matching ``condition``."""
    return {"sqlite_where": text(condition), "postgresql_where": text(condition)}


_SQLITE_NOTES_APPEND_ONLY = (
    "CREATE TRIGGER event_notes_no_update BEFORE UPDATE ON event_notes "
    "BEGIN SELECT RAISE(ABORT, 'event notes are append-only (audit trail): UPDATE refused'); END",
    "CREATE TRIGGER event_notes_no_delete BEFORE DELETE ON event_notes "
    "BEGIN SELECT RAISE(ABORT, 'event notes are append-only (audit trail): DELETE refused'); END",
)

_PG_NOTES_APPEND_ONLY = (
    "CREATE OR REPLACE FUNCTION leadline_notes_append_only() RETURNS trigger "
    "LANGUAGE plpgsql AS $$ BEGIN RAISE EXCEPTION "
    "'event notes are append-only (audit trail): %% refused', TG_OP; END $$",
    "CREATE TRIGGER event_notes_append_only BEFORE UPDATE OR DELETE ON event_notes "
    "FOR EACH ROW EXECUTE FUNCTION leadline_notes_append_only()",
)


def make_notes_append_only(notes: Table) -> None:
    """Create, with the ``event_notes`` table, the triggers that refuse UPDATE and DELETE."""
    for stmt in _SQLITE_NOTES_APPEND_ONLY:
        event.listen(notes, "after_create", DDL(stmt).execute_if(dialect="sqlite"))
    for stmt in _PG_NOTES_APPEND_ONLY:
        event.listen(notes, "after_create", DDL(stmt).execute_if(dialect="postgresql"))


def lock_schema(conn: Connection) -> None:
    """Serialise schema creation and upgrades between processes, within ``conn``'s transaction."""
    # SQLite: BEGIN IMMEDIATE already serialises writers. PostgreSQL: two
    # processes creating a fresh schema at once would collide, so take a
    # transaction-scoped advisory lock (key: an arbitrary fixed number).
    if conn.dialect.name == "postgresql":
        conn.execute(text("SELECT pg_advisory_xact_lock(7406215301)"))


def replace_note_kinds(conn: Connection, notes: Table, kinds: tuple[str, ...]) -> None:
    """Let ``event_notes`` take the note ``kinds`` (a schema upgrade step, in its transaction).

    PostgreSQL replaces the CHECK constraint in place. SQLite cannot alter
    a constraint, so the table is rebuilt: its rows read with their ids, the
    table dropped and created as ``notes`` (with its indexes and append-only
    triggers), the rows put back.
    """
    if conn.dialect.name == "postgresql":
        listed = ", ".join(f"'{k}'" for k in kinds)
        conn.exec_driver_sql("ALTER TABLE event_notes DROP CONSTRAINT ck_event_notes_kind_known")
        conn.exec_driver_sql(f"ALTER TABLE event_notes ADD CONSTRAINT ck_event_notes_kind_known "
                             f"CHECK (kind IN ({listed}))")
        return
    rows = [dict(r._mapping) for r in conn.execute(notes.select()).all()]
    conn.exec_driver_sql("DROP TABLE event_notes")
    notes.create(conn)
    if rows:
        conn.execute(notes.insert(), rows)
