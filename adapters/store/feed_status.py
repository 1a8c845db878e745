"""Each feed's state as the running service last saw it, and the service's heartbeat.

The service stages one :class:`FeedStatusRow` per feed that changed since
the last flush (a reading, a state change, a new unit) and one
:class:`Heartbeat` per beat; both commit with the next flush. ``leadline
status`` reads them back: the feed rows for the health view, the heartbeat
to tell a running service (beat younger than a few beat intervals) from a
stopped one.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any, Callable, Iterable

from sqlalchemy import Connection, select

from leadline.adapters.ports import ALIVE_BEATS, FeedStatusRow, Heartbeat

from . import schema

__all__ = ["ALIVE_BEATS", "FeedStatusRow", "Heartbeat", "read_feed_status", "read_heartbeats",
           "write_feed_status", "write_heartbeat"]

def write_feed_status(conn: Connection, insert: Callable[..., Any], rows: Iterable[FeedStatusRow],
                      now: datetime) -> None:
    """Upsert the staged rows (the caller's transaction; ``updated_at`` = ``now``)."""
    fs = schema.feed_status
    values = [{
        "feed_id": r.feed_id, "state": r.state, "last_reading_at": r.last_reading_at, "last_value": r.last_value,
        "source": r.source, "unit": r.unit, "interval_s": r.interval_s, "learning_have": r.learning_have,
        "learning_need": r.learning_need, "updated_at": now,
    } for r in rows]
    if not values:
        return
    stmt = insert(fs)
    stmt = stmt.on_conflict_do_update(
        index_elements=[fs.c.feed_id],
        set_={c: getattr(stmt.excluded, c) for c in values[0] if c != "feed_id"},
    )
    conn.execute(stmt, values)


def write_heartbeat(conn: Connection, insert: Callable[..., Any], beat: Heartbeat) -> None:
    hb = schema.service_heartbeat
    stmt = insert(hb).values(service=beat.service, started_at=beat.started_at, beat_at=beat.beat_at,
                             beat_interval_s=beat.beat_interval_s, pid=beat.pid, version=beat.version)
    stmt = stmt.on_conflict_do_update(
        index_elements=[hb.c.service],
        set_={c: getattr(stmt.excluded, c) for c in ("started_at", "beat_at", "beat_interval_s", "pid", "version")},
    )
    conn.execute(stmt)


def read_feed_status(conn: Connection) -> dict[str, FeedStatusRow]:
    fs = schema.feed_status
    return {r.feed_id: FeedStatusRow(r.feed_id, r.state, r.last_reading_at,
                                     None if r.last_value is None or r.last_value != r.last_value else r.last_value,
                                     r.source, r.unit, r.interval_s, r.learning_have, r.learning_need, r.updated_at)
            for r in conn.execute(select(fs).order_by(fs.c.feed_id))}


def read_heartbeats(conn: Connection) -> list[Heartbeat]:
    hb = schema.service_heartbeat
    return [Heartbeat(r.service, r.started_at, r.beat_at, r.beat_interval_s, r.pid, r.version)
            for r in conn.execute(select(hb).order_by(hb.c.beat_at.desc()))]
