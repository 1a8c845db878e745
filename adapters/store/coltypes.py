"""Column types that behave the same on SQLite and PostgreSQL.

SQLite has no time zone type: ``DateTime(timezone=True)`` comes back naive.
PostgreSQL ``timestamptz`` keeps the instant but returns it in the session's
zone. :class:`UTCDateTime` stores UTC on both and always returns an aware
UTC ``datetime``. The other types smooth over smaller differences (NaN,
unsigned 64-bit inode numbers, JSON kept as plain text).
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timezone
from typing import Any

from sqlalchemy import BigInteger, DateTime, Double, Text
from sqlalchemy.types import TypeDecorator

from .dialects import stores_naive_utc

_TWO_63 = 1 << 63
_TWO_64 = 1 << 64


class UTCDateTime(TypeDecorator):
    """A timezone-aware UTC instant on every backend.

    Binding a naive ``datetime`` raises ``ValueError``: a time without a zone
    is ambiguous, and guessing would corrupt the audit trail. Aware values in
    any zone are converted to UTC. SQLite stores the naive UTC wall time
    (ISO text, microsecond precision); PostgreSQL stores ``timestamptz``.
    Results are always aware and in UTC.
    """

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Any) -> datetime | None:
        if value is None:
            return None
        if not isinstance(value, datetime):
            raise ValueError(f"expected a datetime, got {type(value).__name__}: {value!r}")
        if value.tzinfo is None or value.utcoffset() is None:
            raise ValueError(f"expected a timezone-aware UTC datetime, got naive {value.isoformat()}")
        utc = value.astimezone(timezone.utc)
        if stores_naive_utc(dialect):
            return utc.replace(tzinfo=None)
        return utc

    def process_result_value(self, value: datetime | None, dialect: Any) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            return value.replace(tzinfo=timezone.utc)
        return value.astimezone(timezone.utc)


class NanFloat(TypeDecorator):
    """A double where NaN is stored as NULL and read back as NaN.

    SQLite turns a bound NaN into NULL by itself, PostgreSQL keeps it; mapping
    NaN to NULL on both makes queries (``IS NULL``, ``max``) agree.
    """

    impl = Double
    cache_ok = True

    def process_bind_param(self, value: float | None, dialect: Any) -> float | None:
        if value is None:
            return None
        value = float(value)
        return None if math.isnan(value) else value

    def process_result_value(self, value: float | None, dialect: Any) -> float:
        return float("nan") if value is None else float(value)


class UInt64(TypeDecorator):
    """An unsigned 64-bit integer (``st_dev``, ``st_ino``) in a signed BIGINT.

    Values at or above 2**63 are stored in two's complement, so every value
    ``0 <= v < 2**64`` round-trips exactly.
    """

    impl = BigInteger
    cache_ok = True

    def process_bind_param(self, value: int | None, dialect: Any) -> int | None:
        if value is None:
            return None
        value = int(value)
        if not 0 <= value < _TWO_64:
            raise ValueError(f"expected an unsigned 64-bit integer, got {value}")
        return value - _TWO_64 if value >= _TWO_63 else value

    def process_result_value(self, value: int | None, dialect: Any) -> int | None:
        if value is None:
            return None
        return value + _TWO_64 if value < 0 else value


def _json_default(obj: Any) -> Any:
    # numpy scalars and arrays (fit statistics, parameters) without importing numpy
    if hasattr(obj, "tolist"):
        return obj.tolist()
    if hasattr(obj, "item"):
        return obj.item()
    if isinstance(obj, datetime):
        return obj.astimezone(timezone.utc).isoformat()
    raise TypeError(f"value of type {type(obj).__name__} is not JSON-serialisable: {obj!r}")


_ENCODER = json.JSONEncoder(sort_keys=True, default=_json_default, separators=(",", ":"))


def dumps_json(value: Any) -> str:
    """JSON text with sorted keys; NaN and infinities are written as
    ``NaN``/``Infinity`` (Python's JSON extension) so nothing is lost."""
    return _ENCODER.encode(value)


class JSONText(TypeDecorator):
    """A JSON document kept as plain text on both backends.

    Plain text (not PostgreSQL ``jsonb``) keeps NaN, which fit statistics can
    hold, and keeps both backends byte-identical.
    """

    impl = Text
    cache_ok = True

    def process_bind_param(self, value: Any, dialect: Any) -> str | None:
        if value is None:
            return None
        return dumps_json(value)

    def process_result_value(self, value: str | None, dialect: Any) -> Any:
        if value is None:
            return None
        return json.loads(value)
