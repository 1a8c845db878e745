"""The ``evidence`` table: the slots around each alarm episode, packed compactly.

One row per episode, keyed like its event (start, feed, rule). ``data`` holds
five little-endian float32 arrays one after the other: the slot times as
seconds after ``base_epoch_s`` (the first slot's time, kept as a float64
column, so the times stay exact to the second for runs of up to 194 days:
float32 holds integers exactly up to 2**24), then the reading, the forecast
and the lower and upper interval limits. Those 20 bytes per slot are
byte-shuffled (all first bytes of the floats, then all second bytes, ...)
and compressed with zlib; the shuffle puts the slowly changing sign and
exponent bytes side by side, which roughly halves a typical record (132
slots: 2,640 bytes packed, about 1,300 stored).

A record of an open episode (``complete = 0``) is replaced by later ones;
a complete record is never replaced by an incomplete one (a replay after a
restart captures less than the first run did).
"""

from __future__ import annotations

from datetime import datetime
from typing import Any, Callable, Iterable, Sequence

import zlib

import numpy as np
from sqlalchemy import Connection, and_, or_, select, tuple_

from leadline.detector.errors import StoreError
from leadline.detector.evidence import EvidenceRecord, record_from_arrays

from . import schema

_LAYOUT = np.dtype("<f4")
_IN_CHUNK = 200


def pack(record: EvidenceRecord) -> tuple[float, bytes]:
    """``(base_epoch_s, data)`` of a record (see the module docstring)."""
    n = len(record)
    base = float(record.epoch_s[0]) if n else 0.0
    arrays = np.stack([record.epoch_s - base, record.value, record.forecast, record.lower, record.upper])
    floats = np.ascontiguousarray(arrays, dtype=_LAYOUT).reshape(-1)
    shuffled = floats.view(np.uint8).reshape(-1, 4).T.tobytes()
    return base, zlib.compress(shuffled, 6)


def unpack(base_epoch_s: float, data: bytes, slots: int) -> tuple[np.ndarray, ...]:
    """The five arrays of a packed record: epoch_s (float64), value, forecast, lower, upper."""
    try:
        shuffled = zlib.decompress(bytes(data))
    except zlib.error as exc:
        raise StoreError(f"evidence data of {slots} slots cannot be unpacked: {exc}") from exc
    if len(shuffled) != 5 * 4 * slots:
        raise StoreError(f"evidence data holds {len(shuffled)} bytes unpacked, expected {5 * 4 * slots} "
                         f"for {slots} slots")
    raw = np.frombuffer(shuffled, dtype=np.uint8).reshape(4, -1).T.copy()
    arrays = raw.view(_LAYOUT).reshape(5, slots)
    return (base_epoch_s + arrays[0].astype(float),) + tuple(arrays[i].astype(np.float32) for i in range(1, 5))


def evidence_row(record: EvidenceRecord, now: datetime) -> dict[str, Any]:
    base, data = pack(record)
    return {
        "feed_id": record.feed_id,
        "rule": record.rule,
        "start_at": record.start,
        "end_at": record.end,
        "complete": 1 if record.complete else 0,
        "slots": len(record),
        "omitted_slots": int(record.omitted_slots),
        "base_epoch_s": base,
        "data": data,
        "updated_at": now,
    }


def write_evidence(conn: Connection, insert: Callable[..., Any], records: Iterable[EvidenceRecord],
                   now: datetime) -> int:
    """Upsert records within the caller's transaction; returns the rows sent."""
    rows = [evidence_row(r, now) for r in records]
    if not rows:
        return 0
    ev = schema.evidence
    stmt = insert(ev)
    new = stmt.excluded
    stmt = stmt.on_conflict_do_update(
        index_elements=[ev.c.start_at, ev.c.feed_id, ev.c.rule],
        set_={c: getattr(new, c) for c in ("end_at", "complete", "slots", "omitted_slots", "base_epoch_s", "data",
                                           "updated_at")},
        # a complete record is never replaced by an incomplete one
        where=or_(ev.c.complete == 0, new.complete == 1),
    )
    conn.execute(stmt, rows)
    return len(rows)


def _to_record(r: Any) -> EvidenceRecord:
    arrays = unpack(r.base_epoch_s, r.data, r.slots)
    return record_from_arrays(r.feed_id, r.rule, r.start_at, bool(r.complete), *arrays, end=r.end_at,
                              omitted_slots=r.omitted_slots)


def read_evidence(conn: Connection, keys: Sequence[tuple[str, str, datetime]]) -> dict[tuple, EvidenceRecord]:
    """The stored records of the given event keys ``(feed_id, rule, start)``."""
    ev = schema.evidence
    out: dict[tuple, EvidenceRecord] = {}
    keys = list(keys)
    for i in range(0, len(keys), _IN_CHUNK):
        chunk = keys[i : i + _IN_CHUNK]
        starts = sorted({k[2] for k in chunk})
        wanted = {(k[0], k[1], k[2]) for k in chunk}
        rows = conn.execute(select(ev).where(and_(ev.c.start_at.in_(starts),
                                                  tuple_(ev.c.feed_id, ev.c.rule).in_(
                                                      sorted({(k[0], k[1]) for k in chunk})))))
        for r in rows:
            record = _to_record(r)
            if record.key in wanted:
                out[record.key] = record
    return out


def evidence_sizes(conn: Connection) -> list[tuple[int, int]]:
    """``(slots, bytes of data)`` of every stored record (for measuring the storage cost)."""
    ev = schema.evidence
    return [(int(s), len(bytes(d))) for s, d in conn.execute(select(ev.c.slots, ev.c.data))]
