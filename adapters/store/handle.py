"""What both sides of the event store share: the engine, the clock, closing.

:class:`StoreHandle` holds the database engine of one open store. The
service's write side (:class:`~.eventstore.EventWriter`) and the review
side (:class:`~.reads.EventQueries`) both build on it, and
:class:`~.eventstore.EventStore` is both.
"""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Any, Callable, Self

from sqlalchemy import Engine

from leadline.detector.errors import StoreError

from .connect import read_transaction, safe_url, translate_errors


def utc_now() -> datetime:
    return datetime.now(timezone.utc)


def require_utc(name: str, value: Any) -> datetime:
    """``value`` as a UTC datetime; :class:`StoreError` for anything but an aware datetime."""
    if not isinstance(value, datetime) or value.tzinfo is None or value.utcoffset() is None:
        raise StoreError(f"{name} must be a timezone-aware UTC datetime, got {value!r}")
    return value.astimezone(timezone.utc)


def require_text(name: str, value: Any) -> str:
    """``value`` if it is a non-empty string; else :class:`StoreError`."""
    if not isinstance(value, str) or not value.strip():
        raise StoreError(f"{name} must be a non-empty string, got {value!r}")
    return value


class StoreHandle:
    """An open store's engine and clock; closing releases the connections.

    Parameters
    ----------
    engine : sqlalchemy.Engine
        From :func:`.connect.create_store_engine`, schema already checked.
    clock : callable, optional
        Returns the current UTC time (``created_at``, note times); for tests.
    """

    def __init__(self, engine: Engine, *, clock: Callable[[], datetime] | None = None) -> None:
        self._engine = engine
        self._clock = clock or utc_now
        self._closed = False

    @property
    def url(self) -> str:
        """The database URL, password hidden."""
        return safe_url(self._engine.url)

    @property
    def backend(self) -> str:
        """``"sqlite"`` or ``"postgresql"``."""
        return self._engine.dialect.name

    @property
    def engine(self) -> Engine:
        return self._engine

    def _check_open(self) -> None:
        if self._closed:
            raise StoreError(f"the event store {self.url} is closed")

    def _read(self, what: str, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
        self._check_open()
        with read_transaction(self._engine, what) as conn:
            return fn(conn, *args, **kwargs)

    def close(self) -> None:
        """Release the connections; closing twice does nothing."""
        if self._closed:
            return
        self._closed = True
        with translate_errors("closing the store", self._engine.url):
            self._engine.dispose()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
