"""The journal of accepted readings and the snapshots it is replayed from.

Tables (schema step ``_add_journal``)
-------------------------------------
``journal_feeds``
    One row per feed that ever had a reading journaled: a small integer
    ``feed_key`` (journal rows carry it instead of the id text), the count
    of readings ever journaled for the feed (``journaled``, kept across
    truncation, so "every reading exactly once" can be checked), and the
    feed's latest snapshot: its state bytes, model version and the journal
    position ``snapshot_seq`` it covers (NULL: no snapshot yet).
``journal``
    One row per accepted reading: ``seq`` (the global journal position, the
    primary key), ``feed_key``, ``t`` (reading time, seconds since the
    epoch), ``value`` (NULL for NaN). Indexed by ``(feed_key, seq)`` for
    truncation.

All of it is written by :func:`write_journal` inside the store's flush, in
the SAME transaction as the events, the CSV offsets (and before the MQTT
acks, which follow the commit): the journal, the snapshots and the sources'
positions are one consistent cut.

Truncation lags one snapshot: when a feed's new snapshot is written, the
rows up to its *previous* snapshot's position are deleted, so the journal
always keeps the readings of the last snapshot interval. The service reads
them at start to recognise an MQTT message that was committed but not yet
acknowledged when the service died, and comes again.
"""

from __future__ import annotations

import math
from contextlib import nullcontext
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import (BigInteger, Column, Connection, Double, Index, Integer, LargeBinary, MetaData, Table, Text,
                        UniqueConstraint, bindparam, case, delete, func, or_, select, update)

from .coltypes import UTCDateTime
from .dialects import SURROGATE_ID, insert_plain_rows
from .timing import NO_TIMING


#: Feed keys per ``IN (...)`` list when a snapshot round reads the previous positions
#: (well under SQLite's limit of bound parameters).
SNAPSHOT_CHUNK = 500


def add_journal_tables(md: MetaData) -> None:
    """Add ``journal_feeds`` and ``journal`` to ``md`` (schema step ``_add_journal``)."""
    Table(
        "journal_feeds",
        md,
        Column("feed_key", Integer, primary_key=True, autoincrement=False),
        Column("feed_id", Text, nullable=False),
        Column("journaled", BigInteger, nullable=False),
        Column("last_t", Double, nullable=True),
        Column("snapshot_seq", BigInteger, nullable=True),
        Column("model_version", Integer, nullable=True),
        Column("snapshot", LargeBinary, nullable=True),
        Column("snapshot_at", UTCDateTime(), nullable=True),
        UniqueConstraint("feed_id", name="uq_journal_feeds_id"),
    )
    journal = Table(
        "journal",
        md,
        Column("seq", SURROGATE_ID, primary_key=True, autoincrement=False),
        Column("feed_key", Integer, nullable=False),
        Column("t", Double, nullable=False),
        Column("value", Double, nullable=True),
    )
    Index("ix_journal_feed", journal.c.feed_key, journal.c.seq)


@dataclass
class JournalBuffer:
    """What one flush adds to the journal (held by the write buffer)."""

    rows: list[tuple[int, int, float, float | None]] = field(default_factory=list)
    new_feeds: dict[int, str] = field(default_factory=dict)
    counts: dict[int, int] = field(default_factory=dict)
    #: feed_key -> the latest reading time in this flush
    last_t: dict[int, float] = field(default_factory=dict)
    #: feed_key -> (journal seq covered, model version, state bytes)
    snapshots: dict[int, tuple[int, int, bytes]] = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.rows) + len(self.snapshots) + len(self.new_feeds)


@dataclass(frozen=True)
class JournalState:
    """What a start needs: feed keys, the next position, snapshots, the rows to replay."""

    feed_keys: dict[str, int]
    next_seq: int
    #: feed_id -> (snapshot_seq, model_version, state bytes)
    snapshots: dict[str, tuple[int, int, bytes]]
    #: every kept row in journal order: (seq, feed_id, t, value)
    rows: list[tuple[int, str, float, float]]
    journaled: dict[str, int]
    #: feed_id -> the latest reading time ever journaled (kept across truncation)
    last_t: dict[str, float] = field(default_factory=dict)


def write_journal(conn: Connection, md: MetaData, buf: JournalBuffer, now, timing: Any = NO_TIMING) -> None:
    """Write one flush's journal rows, counts and snapshots (in the caller's transaction).

    ``timing`` (:class:`~.timing.StoreTiming`) gets the rows and counts as ``journal``, the
    snapshots with their truncation as ``snapshots``.
    """
    jf, j = md.tables["journal_feeds"], md.tables["journal"]
    with timing.part("journal") if (buf.new_feeds or buf.rows or buf.counts) else nullcontext():
        if buf.new_feeds:
            conn.execute(jf.insert(), [{"feed_key": k, "feed_id": f, "journaled": 0}
                                       for k, f in buf.new_feeds.items()])
        if buf.rows:
            insert_plain_rows(conn, j, ("seq", "feed_key", "t", "value"), buf.rows)
        if buf.counts:
            t = bindparam("t")
            conn.execute(update(jf).where(jf.c.feed_key == bindparam("k")).values(
                journaled=jf.c.journaled + bindparam("n"),
                last_t=case((or_(jf.c.last_t.is_(None), jf.c.last_t < t), t), else_=jf.c.last_t)),
                [{"k": k, "n": n, "t": buf.last_t[k]} for k, n in buf.counts.items()])
    if not buf.snapshots:
        return
    with timing.part("snapshots"):
        # three statements for the whole round, not three per feed: the previous positions in
        # chunks, then one executemany each for the truncation and the new snapshots
        keys = list(buf.snapshots)
        previous: dict[int, int] = {}
        for start in range(0, len(keys), SNAPSHOT_CHUNK):
            chunk = keys[start:start + SNAPSHOT_CHUNK]
            previous.update((k, p) for k, p in conn.execute(
                select(jf.c.feed_key, jf.c.snapshot_seq).where(jf.c.feed_key.in_(chunk))) if p is not None)
        if previous:
            conn.execute(delete(j).where(j.c.feed_key == bindparam("k"), j.c.seq <= bindparam("p")),
                         [{"k": k, "p": p} for k, p in previous.items()])
        conn.execute(update(jf).where(jf.c.feed_key == bindparam("k")).values(
            snapshot_seq=bindparam("s"), model_version=bindparam("m"), snapshot=bindparam("b"),
            snapshot_at=bindparam("a", type_=UTCDateTime())),
            [{"k": k, "s": seq, "m": version, "b": state, "a": now}
             for k, (seq, version, state) in buf.snapshots.items()])


def read_journal(conn: Connection, md: MetaData) -> JournalState:
    """Everything a start needs from the journal (see :class:`JournalState`)."""
    jf, j = md.tables["journal_feeds"], md.tables["journal"]
    keys: dict[str, int] = {}
    names: dict[int, str] = {}
    snapshots: dict[str, tuple[int, int, bytes]] = {}
    journaled: dict[str, int] = {}
    last_t: dict[str, float] = {}
    top = 0
    for r in conn.execute(select(jf)):
        keys[r.feed_id], names[r.feed_key] = r.feed_key, r.feed_id
        journaled[r.feed_id] = int(r.journaled)
        if r.last_t is not None:
            last_t[r.feed_id] = float(r.last_t)
        if r.snapshot_seq is not None:
            snapshots[r.feed_id] = (int(r.snapshot_seq), int(r.model_version), bytes(r.snapshot))
            top = max(top, int(r.snapshot_seq))
    rows = [(int(s), names[k], float(t), math.nan if v is None else float(v))
            for s, k, t, v in conn.execute(select(j.c.seq, j.c.feed_key, j.c.t, j.c.value).order_by(j.c.seq))]
    last = conn.execute(select(func.max(j.c.seq))).scalar()
    top = max(top, int(last or 0))
    return JournalState(keys, top + 1, snapshots, rows, journaled, last_t)


def journal_counts(conn: Connection, md: MetaData) -> dict[str, int]:
    """``{feed_id: readings ever journaled}``."""
    jf = md.tables["journal_feeds"]
    return {r.feed_id: int(r.journaled) for r in conn.execute(select(jf.c.feed_id, jf.c.journaled))}


def bytes_of_value(value: float) -> float | None:
    """A reading's value as stored: NaN becomes NULL."""
    value = float(value)
    return None if math.isnan(value) else value
