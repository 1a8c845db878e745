"""Engines for the event store, short transactions, and error translation.

What differs between SQLite and PostgreSQL (PRAGMAs, ``BEGIN IMMEDIATE``
for writes, connect options, driver errors) is in :mod:`.dialects`; this
module is the same for both.
"""

from __future__ import annotations

import os
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from sqlalchemy import Connection, Engine
from sqlalchemy.engine import URL, make_url
from sqlalchemy.exc import ArgumentError, SQLAlchemyError

from leadline.detector.errors import StoreError

from .dialects import SQLITE_SYNCHRONOUS as _SYNCHRONOUS
from .dialects import WRITE_OPTION, check_url, create_dialect_engine, driver_errors


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
    check_url(parsed, safe_url(parsed))
    return parsed


def safe_url(url: URL) -> str:
    """The URL with any password hidden, for messages."""
    return url.render_as_string(hide_password=True)


def create_store_engine(
    url: URL, *, busy_timeout_s: float = 10.0, sqlite_synchronous: str = "NORMAL"
) -> Engine:
    """An engine configured for the store (see :mod:`.dialects`).

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
        engine = create_dialect_engine(url, busy_timeout_s=busy_timeout_s, synchronous=sync)
    except (SQLAlchemyError, ImportError) as exc:
        raise StoreError(f"cannot create an engine for {safe_url(url)}: {exc}") from exc
    return engine


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
        if not isinstance(exc, driver_errors()):
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
