"""Read queries of the shift report and summary that the review listings do not need.

Run them in a read transaction (:func:`.connect.read_transaction` on
``EventStore.engine``), like :mod:`.queries`.
"""

from __future__ import annotations

from datetime import datetime, timedelta

from sqlalchemy import Connection, or_, select

from . import schema
from .queries import _stored
from .records import StoredEvent


def active_at(conn: Connection, moment: datetime, older_than_h: float = 0.0,
              rule: str | None = None) -> list[StoredEvent]:
    """Events active at ``moment`` that started at least ``older_than_h`` hours before it.

    Active at ``moment``: started at or before it and not cleared by then
    (no end, or an end after it), so a past shift sees the events that were
    standing then, even if they have cleared since.
    """
    ev = schema.events
    cutoff = moment - timedelta(hours=older_than_h)
    q = select(ev).where(ev.c.start_at <= cutoff, or_(ev.c.end_at.is_(None), ev.c.end_at > moment))
    if rule is not None:
        q = q.where(ev.c.rule == rule)
    rows = conn.execute(q.order_by(ev.c.start_at, ev.c.id)).all()
    return _stored(conn, rows)
