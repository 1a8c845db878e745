"""Engines for the event store, short transactions, and error translation.

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
here begins with ``BEGIN IMMEDIATE`` (the write lock is taken up front, and
waiting for it honours ``busy_timeout``); read transactions use a plain
``BEGIN``. This follows the recipe "Using SQLAlchemy to emit BEGIN in lieu
of SQLite's transaction control" of the SQLAlchemy SQLite dialect docs: the
sqlite3 driver's own transaction control is switched off
(``isolation_level = None``) and a ``begin`` listener emits BEGIN.

PostgreSQL (``postgresql+psycopg://...``) needs none of this: its row locks
and ``INSERT ... ON CONFLICT`` give the same behaviour under READ COMMITTED.
"""

from __future__ import annotations

import os
import sqlite3
import sys
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from sqlalchemy import Connection, Engine, create_engine, event
from sqlalchemy.engine import URL, make_url
from sqlalchemy.exc import ArgumentError, SQLAlchemyError

from leadline.detector.errors import StoreError

#: Execution option that marks a connection's next transaction as a write.
WRITE_OPTION = "leadline_write"

_SYNCHRONOUS = ("OFF", "NORMAL", "FULL", "EXTRA")


def resolve_url(url: str | None, path: str | os.PathLike[str] = "leadline.db") -> URL:
    """The database URL to open.

    Parameters
    ----------
    url : str or None
        An SQLAlchemy URL (``sqlite:///file.db``,
        ``postgresql+psycopg://user@host:5432/db``), or a plain file path,
        taken as an SQLite file. None means ``path``.
    path : path-like
        The SQLite file used when ``url`` is None.

    Raises
    ------
    StoreError
        For an unparseable URL or an in-memory SQLite database (WAL and
        sharing with another process need a file).
    """
    if url is None:
        url = f"sqlite:///{Path(path)}"
    elif "://" not in url:
        url = f"sqlite:///{Path(url)}"
    try:
        parsed = make_url(url)
    except (ArgumentError, ValueError) as exc:  # ValueError: a port that is not a number
        raise StoreError(f"cannot parse the store URL {url!r}: {exc}") from exc
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
            f"unsupported store backend {backend!r} in {safe_url(parsed)}; "
            "expected an SQLite file or postgresql+psycopg://"
        )
    return parsed


def safe_url(url: URL) -> str:
    """The URL with any password hidden, for messages."""
    return url.render_as_string(hide_password=True)


def create_store_engine(
    url: URL, *, busy_timeout_s: float = 10.0, sqlite_synchronous: str = "NORMAL"
) -> Engine:
    """An engine configured for the store (see the module notes).

    Parameters
    ----------
    url : sqlalchemy.engine.URL
        From :func:`resolve_url`.
    busy_timeout_s : float
        SQLite: how long a writer waits for the write lock (and a reader
        for WAL recovery) before giving up with "database is locked".
    sqlite_synchronous : str
        SQLite ``PRAGMA synchronous``: ``"NORMAL"`` (default) or ``"FULL"``.
    """
    sync = sqlite_synchronous.upper()
    if sync not in _SYNCHRONOUS:
        raise StoreError(f"sqlite_synchronous must be one of {_SYNCHRONOUS}, got {sqlite_synchronous!r}")
    if busy_timeout_s < 0:
        raise StoreError(f"busy_timeout_s must be >= 0, got {busy_timeout_s}")
    try:
        if url.get_backend_name() == "sqlite":
            engine = create_engine(
                url, connect_args={"timeout": busy_timeout_s, "check_same_thread": False}
            )
            _install_sqlite_listeners(engine, busy_timeout_ms=int(busy_timeout_s * 1000), synchronous=sync)
        else:
            # fail within a bounded time when the server does not answer
            connect_args = {} if "connect_timeout" in url.query else {"connect_timeout": 10}
            engine = create_engine(url, pool_pre_ping=True, connect_args=connect_args)
    except (SQLAlchemyError, ImportError) as exc:
        raise StoreError(f"cannot create an engine for {safe_url(url)}: {exc}") from exc
    return engine


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


def _driver_errors() -> tuple[type[BaseException], ...]:
    # psycopg is imported by SQLAlchemy only for PostgreSQL URLs; if it is
    # not loaded, none of its errors can occur (and SQLite users skip its import).
    errors: tuple[type[BaseException], ...] = (SQLAlchemyError, sqlite3.Error)
    psycopg = sys.modules.get("psycopg")
    return errors + (psycopg.Error,) if psycopg is not None else errors


@contextmanager
def translate_errors(what: str, url: URL) -> Iterator[None]:
    """Turn sqlalchemy, sqlite3 and psycopg errors into :class:`StoreError`.

    The message names the operation and the (password-free) URL, and keeps
    the driver's own text (for example "database is locked").
    """
    try:
        yield
    except StoreError:
        raise
    except Exception as exc:
        if not isinstance(exc, _driver_errors()):
            raise
        orig = getattr(exc, "orig", None) or exc
        detail = str(orig).strip().splitlines()[0] if str(orig).strip() else type(orig).__name__
        raise StoreError(f"{what} failed on {safe_url(url)}: {detail}") from exc


@contextmanager
def write_transaction(engine: Engine, what: str) -> Iterator[Connection]:
    """A short write transaction (``BEGIN IMMEDIATE`` on SQLite), committed
    on leaving the block; errors are translated to :class:`StoreError`."""
    with translate_errors(what, engine.url):
        with engine.connect() as conn:
            conn.execution_options(**{WRITE_OPTION: True})
            with conn.begin():
                yield conn


@contextmanager
def read_transaction(engine: Engine, what: str) -> Iterator[Connection]:
    """A read transaction (a consistent snapshot); errors translated."""
    with translate_errors(what, engine.url):
        with engine.connect() as conn:
            with conn.begin():
                yield conn
