"""Batched writes: stage in memory, then commit everything in one transaction.

:class:`WriteBuffer` holds what the service has staged since the last flush:
events (merged per key), the latest checkpoint per feed, the latest offset
per followed file, reject counts (exact deltas, staged apart from the
samples) with a bounded sample, and evidence records (:mod:`.evidence`).
:func:`write_buffer`
writes a buffer inside a transaction the caller opened, so the events, the
checkpoints and the CSV offsets that produced them commit together, or not
at all.

Notes
-----
Merging two copies of one episode (same ``(feed_id, rule, start)``), in the
buffer and in the database upsert alike:

- ``severity``: the higher of the two (``warning`` < ``alarm``);
- ``end``: the newer copy's if set, else the older one's (a replayed onset
  never reopens a closed episode);
- ``peak_abs_z``: the larger, NaN counting as absent;
- ``detail``: the newer copy's if it closes the episode, else the older one's;
- onset fields (value, forecast, interval, parameters, model version): kept
  from the first copy.

So applying the same copies again, in any number and in any grouping into
flushes, leaves the row as it was (``updated_at`` aside).
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field, replace
from datetime import datetime
from typing import Any, Callable

from sqlalchemy import Connection, and_, case, delete, func, literal_column, or_, select
from sqlalchemy.engine import Dialect

from leadline.adapters.ports import RejectSample, SourceOffset
from leadline.detector.events import SEVERITIES, AlarmEvent
from leadline.detector.evidence import EvidenceRecord

from . import schema
from .journal import JournalBuffer, write_journal
from .timing import NO_TIMING
from .evidence import write_evidence
from .feed_status import FeedStatusRow, Heartbeat, write_feed_status, write_heartbeat
from .coltypes import dumps_json
from .dialects import driver_time_for, insert_for

#: Reject samples kept per (source, reason); older ones are deleted.
REJECT_SAMPLE_LIMIT = 20

_SEVERITY_RANK = {s: i for i, s in enumerate(SEVERITIES)}


def merge_events(old: AlarmEvent, new: AlarmEvent) -> AlarmEvent:
    """Two copies of one episode merged (see the module notes)."""
    if old.key != new.key:
        raise ValueError(f"cannot merge different episodes {old.key} and {new.key}")
    severity = max(old.severity, new.severity, key=_SEVERITY_RANK.__getitem__)
    peaks = [p for p in (old.peak_abs_z, new.peak_abs_z) if not math.isnan(p)]
    return replace(
        old,
        severity=severity,
        end=new.end if new.end is not None else old.end,
        peak_abs_z=max(peaks) if peaks else float("nan"),
        detail=new.detail if new.end is not None else old.detail,
    )


@dataclass
class _RejectTally:
    count: int
    first_seen: datetime
    last_seen: datetime
    samples: deque = field(default_factory=lambda: deque(maxlen=REJECT_SAMPLE_LIMIT))


class WriteBuffer:
    """What was staged since the last successful flush. Not thread-safe."""

    def __init__(self) -> None:
        self.events: dict[tuple[str, str, datetime], AlarmEvent] = {}
        #: ``parameters`` of each staged event as JSON text, encoded on staging
        #: so that an event that cannot be stored is refused at once instead of
        #: failing every later flush.
        self.parameters_json: dict[tuple[str, str, datetime], str] = {}
        self.checkpoints: dict[str, tuple[bytes, int]] = {}
        self.offsets: dict[tuple[str, str], SourceOffset] = {}
        self.rejects: dict[tuple[str, str], _RejectTally] = {}
        #: Evidence records per event key; the latest staged one wins.
        self.evidence: dict[tuple[str, str, datetime], EvidenceRecord] = {}
        #: The latest staged status per feed, and the latest heartbeat.
        self.feed_status: dict[str, FeedStatusRow] = {}
        self.heartbeat: Heartbeat | None = None

        #: Named service marks (``service_marks``); the latest staged value wins.
        self.marks: dict[str, int] = {}

        #: Journal rows and snapshots (:mod:`.journal`), written in the same transaction.
        self.journal = JournalBuffer()

    def __len__(self) -> int:
        return (len(self.events) + len(self.checkpoints) + len(self.offsets) + len(self.rejects) + len(self.evidence)
                + len(self.feed_status) + (self.heartbeat is not None) + len(self.marks) + len(self.journal))

    def add_event(self, ev: AlarmEvent) -> None:
        """Stage ``ev``, merged with a staged copy of the same episode.

        Raises ``TypeError`` or ``ValueError`` (nothing staged) when its
        parameters are not JSON-serialisable.
        """
        old = self.events.get(ev.key)
        if old is None:
            self.parameters_json[ev.key] = dumps_json(ev.parameters)
            self.events[ev.key] = ev
        else:
            self.events[ev.key] = merge_events(old, ev)

    def add_evidence(self, record: EvidenceRecord) -> None:
        """Stage an evidence record; a complete one is not replaced by an incomplete one."""
        old = self.evidence.get(record.key)
        if old is None or record.complete or not old.complete:
            self.evidence[record.key] = record

    def add_checkpoint(self, feed_id: str, state: bytes, model_version: int) -> None:
        self.checkpoints[feed_id] = (bytes(state), int(model_version))

    def add_offset(self, off: SourceOffset) -> None:
        self.offsets[(off.source, off.path)] = off

    def add_reject(self, sample: RejectSample) -> None:
        """One reject: counted once and kept as a sample."""
        self.add_reject_sample(sample)
        self.add_reject_count(sample.source, sample.reason, 1, sample.seen_at, sample.seen_at)

    def add_reject_sample(self, sample: RejectSample) -> None:
        """Keep ``sample`` (bounded per source and reason) without counting it."""
        tally = self._tally(sample.source, sample.reason, sample.seen_at, sample.seen_at)
        tally.samples.append(sample)

    def add_reject_count(self, source: str, reason: str, count: int, first_seen: datetime,
                         last_seen: datetime) -> None:
        """Add ``count`` rejects of (source, reason) seen between the two times."""
        tally = self._tally(source, reason, first_seen, last_seen)
        tally.count += int(count)

    def _tally(self, source: str, reason: str, first_seen: datetime, last_seen: datetime) -> _RejectTally:
        tally = self.rejects.get((source, reason))
        if tally is None:
            tally = self.rejects[(source, reason)] = _RejectTally(0, first_seen, last_seen)
        tally.first_seen = min(tally.first_seen, first_seen)
        tally.last_seen = max(tally.last_seen, last_seen)
        return tally


def event_row(ev: AlarmEvent, now: datetime) -> dict[str, Any]:
    """The ``events`` columns of an event as Python values (no surrogate id).

    This is the reference for :meth:`EventUpsert.rows`: passed through the
    column types of :mod:`.schema` it must give the very same driver values
    (a test checks this on both backends).
    """
    return {
        "feed_id": ev.feed_id,
        "rule": ev.rule,
        "severity": ev.severity,
        "start_at": ev.start,
        "end_at": ev.end,
        "peak_abs_z": ev.peak_abs_z,
        "value_at_onset": ev.value_at_onset,
        "forecast_at_onset": ev.forecast_at_onset,
        "lower_at_onset": ev.lower_at_onset,
        "upper_at_onset": ev.upper_at_onset,
        "parameters": ev.parameters,
        "model_version": ev.model_version,
        "detail": ev.detail,
        "caution": ev.caution,
        "created_at": now,
        "updated_at": now,
        "start_hour": schema.start_hour_of(ev.start.timestamp()),
        "incident_start": ev.incident_start,
    }


def _event_upsert(insert: Callable[..., Any]) -> Any:
    ev = schema.events
    stmt = insert(ev)
    new = stmt.excluded
    # Constants are inlined (literal_column) so the only bound parameters
    # are the row's columns; see EventUpsert.
    alarm, warning = literal_column("'alarm'"), literal_column("'warning'")
    return stmt.on_conflict_do_update(
        index_elements=[ev.c.feed_id, ev.c.rule, ev.c.start_at],
        set_={
            "severity": case((or_(new.severity == alarm, ev.c.severity == alarm), alarm), else_=warning),
            "end_at": func.coalesce(new.end_at, ev.c.end_at),
            "peak_abs_z": case(
                (new.peak_abs_z.is_(None), ev.c.peak_abs_z),
                (ev.c.peak_abs_z.is_(None), new.peak_abs_z),
                (new.peak_abs_z > ev.c.peak_abs_z, new.peak_abs_z),
                else_=ev.c.peak_abs_z,
            ),
            "detail": case((new.end_at.is_not(None), new.detail), else_=ev.c.detail),
            "incident_start": func.coalesce(ev.c.incident_start, new.incident_start),
            "updated_at": new.updated_at,
        },
    )


#: The event columns in the order :meth:`EventUpsert.rows` builds them.
_EVENT_COLUMNS = (
    "feed_id", "rule", "severity", "start_at", "end_at", "peak_abs_z", "value_at_onset",
    "forecast_at_onset", "lower_at_onset", "upper_at_onset", "parameters", "model_version",
    "detail", "caution", "created_at", "updated_at", "start_hour", "incident_start",
)  # fmt: skip
if set(_EVENT_COLUMNS) != {c.name for c in schema.events.columns} - {"id"}:
    raise RuntimeError("writer._EVENT_COLUMNS is out of step with schema.events")


def _nan_to_none(x: float) -> float | None:
    x = float(x)
    return None if x != x else x


class EventUpsert:
    """The event upsert, compiled once per dialect, executed straight on the driver.

    The statement is the dialect's ``INSERT ... ON CONFLICT (feed_id, rule,
    start_at) DO UPDATE`` built with SQLAlchemy Core (:func:`_event_upsert`);
    only the per-row bind conversion is done here, in one tight loop instead
    of one SQLAlchemy type processor per value. That triples the batched
    write rate on SQLite. The conversions are those of :mod:`.coltypes`
    (UTC, NaN as NULL, JSON text), and a test holds them equal to the typed
    path.
    """

    def __init__(self, dialect: Dialect) -> None:
        compiled = _event_upsert(insert_for(dialect)).compile(
            dialect=dialect, column_keys=list(_EVENT_COLUMNS), for_executemany=True  # no RETURNING
        )
        self.sql = str(compiled)
        self._time = driver_time_for(dialect)
        self.positional = bool(compiled.positional)
        names = tuple(compiled.positiontup or ()) if self.positional else tuple(compiled.binds)
        if sorted(names) != sorted(_EVENT_COLUMNS):
            raise RuntimeError(f"event upsert binds {names}, expected the columns {_EVENT_COLUMNS}")
        self.names = names

    def rows(self, evs: Any, now: datetime, parameters_json: dict[Any, str] | None = None) -> list[Any]:
        """Driver-ready parameters: tuples (positional) or dicts (named).

        ``parameters_json`` maps event keys to their already encoded
        parameters (see :class:`WriteBuffer`); missing ones are encoded here.
        """
        pj = parameters_json or {}
        t = self._time
        now_db = t(now)
        nan = _nan_to_none
        hour = schema.start_hour_of
        # In _EVENT_COLUMNS order.
        base = [
            (
                ev.feed_id,
                ev.rule,
                ev.severity,
                t(ev.start),
                t(ev.end),
                nan(ev.peak_abs_z),
                nan(ev.value_at_onset),
                nan(ev.forecast_at_onset),
                nan(ev.lower_at_onset),
                nan(ev.upper_at_onset),
                pj[ev.key] if ev.key in pj else dumps_json(ev.parameters),
                None if ev.model_version is None else int(ev.model_version),
                ev.detail,
                ev.caution,
                now_db,
                now_db,
                hour(ev.start.timestamp()),
                t(ev.incident_start),
            )
            for ev in evs
        ]
        if not self.positional:
            return [dict(zip(_EVENT_COLUMNS, row)) for row in base]
        if self.names == _EVENT_COLUMNS:
            return base
        order = [_EVENT_COLUMNS.index(n) for n in self.names]
        return [tuple(row[i] for i in order) for row in base]


_UPSERTS: dict[str, EventUpsert] = {}


def event_upsert_for(dialect: Dialect) -> EventUpsert:
    up = _UPSERTS.get(dialect.name)
    if up is None:
        up = _UPSERTS[dialect.name] = EventUpsert(dialect)
    return up


def write_buffer(conn: Connection, buf: WriteBuffer, now: datetime, timing: Any = NO_TIMING) -> int:
    """Write everything in ``buf`` within the caller's open transaction.

    Parameters
    ----------
    conn : sqlalchemy.Connection
        In a write transaction; the caller commits.
    buf : WriteBuffer
        Left unchanged: the caller clears it only after the commit returned.
    now : datetime
        UTC; ``created_at`` / ``updated_at`` of the rows.
    timing : leadline.adapters.store.timing.StoreTiming, optional
        Adds each part's time (events, journal, snapshots, status, other).

    Returns
    -------
    int
        The number of event rows upserted.
    """
    insert = insert_for(conn)
    feed_ids = ({k[0] for k in buf.events} | set(buf.checkpoints) | {k[0] for k in buf.evidence}
                | set(buf.feed_status))
    if feed_ids:
        with timing.part("status"):
            stmt = insert(schema.feeds).on_conflict_do_nothing(index_elements=[schema.feeds.c.feed_id])
            conn.execute(stmt, [{"feed_id": f, "created_at": now} for f in sorted(feed_ids)])

    if buf.events or buf.evidence:
        with timing.part("events"):
            if buf.events:
                up = event_upsert_for(conn.dialect)
                conn.exec_driver_sql(up.sql, up.rows(buf.events.values(), now, buf.parameters_json))
            if buf.evidence:
                write_evidence(conn, insert, buf.evidence.values(), now)

    if buf.checkpoints:
        with timing.part("snapshots"):
            _write_checkpoints(conn, insert, buf, now)
    if buf.offsets:
        with timing.part("journal"):
            _write_offsets(conn, insert, buf)
    if buf.rejects:
        with timing.part("other"):
            _write_rejects(conn, insert, buf)
    if buf.feed_status or buf.heartbeat is not None:
        with timing.part("status"):
            if buf.feed_status:
                write_feed_status(conn, insert, buf.feed_status.values(), now)
            if buf.heartbeat is not None:
                write_heartbeat(conn, insert, buf.heartbeat)
    if buf.marks:
        with timing.part("other"):
            sm = schema.service_marks
            stmt = insert(sm)
            stmt = stmt.on_conflict_do_update(index_elements=[sm.c.name], set_={
                "value": stmt.excluded.value, "updated_at": stmt.excluded.updated_at})
            conn.execute(stmt, [{"name": k, "value": int(v), "updated_at": now} for k, v in buf.marks.items()])
    if len(buf.journal):
        write_journal(conn, schema.metadata, buf.journal, now, timing)
    return len(buf.events)


def _write_checkpoints(conn: Connection, insert: Callable[..., Any], buf: WriteBuffer, now: datetime) -> None:
    cp = schema.checkpoints
    stmt = insert(cp)
    stmt = stmt.on_conflict_do_update(
        index_elements=[cp.c.feed_id],
        set_={
            "state": stmt.excluded.state,
            "model_version": stmt.excluded.model_version,
            "updated_at": stmt.excluded.updated_at,
        },
    )
    conn.execute(
        stmt,
        [
            {"feed_id": f, "state": state, "model_version": version, "updated_at": now}
            for f, (state, version) in buf.checkpoints.items()
        ],
    )


def _write_offsets(conn: Connection, insert: Callable[..., Any], buf: WriteBuffer) -> None:
    so = schema.source_offsets
    stmt = insert(so)
    stmt = stmt.on_conflict_do_update(
        index_elements=[so.c.source, so.c.path],
        set_={c: getattr(stmt.excluded, c) for c in ("device", "inode", "offset_bytes", "updated_at")},
    )
    conn.execute(
        stmt,
        [
            {
                "source": o.source,
                "path": o.path,
                "device": o.device,
                "inode": o.inode,
                "offset_bytes": o.offset_bytes,
                "updated_at": o.updated_at,
            }
            for o in buf.offsets.values()
        ],
    )


def _write_rejects(conn: Connection, insert: Callable[..., Any], buf: WriteBuffer) -> None:
    rc = schema.reject_counts
    stmt = insert(rc)
    new = stmt.excluded
    stmt = stmt.on_conflict_do_update(
        index_elements=[rc.c.source, rc.c.reason],
        set_={
            "count": rc.c.count + new.count,
            "first_seen": case((new.first_seen < rc.c.first_seen, new.first_seen), else_=rc.c.first_seen),
            "last_seen": case((new.last_seen > rc.c.last_seen, new.last_seen), else_=rc.c.last_seen),
        },
    )
    counted = [
        {"source": s, "reason": r, "count": t.count, "first_seen": t.first_seen, "last_seen": t.last_seen}
        for (s, r), t in buf.rejects.items()
        if t.count > 0
    ]
    if counted:
        conn.execute(stmt, counted)
    rs = schema.reject_samples
    rows = [
        {
            "source": x.source,
            "reason": x.reason,
            "location": x.where,
            "detail": x.detail,
            "raw": bytes(x.raw),
            "seen_at": x.seen_at,
        }
        for t in buf.rejects.values()
        for x in t.samples
    ]
    if not rows:
        return
    conn.execute(rs.insert(), rows)
    for source, reason in {(x["source"], x["reason"]) for x in rows}:
        keep = (
            select(rs.c.id)
            .where(rs.c.source == source, rs.c.reason == reason)
            .order_by(rs.c.id.desc())
            .limit(REJECT_SAMPLE_LIMIT)
        )
        conn.execute(
            delete(rs).where(and_(rs.c.source == source, rs.c.reason == reason, rs.c.id.not_in(keep)))
        )
