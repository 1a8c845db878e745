"""Read-side queries for review: listings with notes, counts, standing events.

Each function takes an open connection (a read transaction, so a listing and
its notes come from one snapshot) and returns records of :mod:`.records`.
The index each query relies on is named in :mod:`.schema`.
"""

from __future__ import annotations

import fnmatch
from collections import defaultdict
from datetime import datetime, timedelta, timezone
from typing import Any, Iterable, Sequence

from sqlalchemy import Connection, and_, exists, func, select

from leadline.adapters.ports import RejectSample, SourceOffset
from leadline.detector.events import SEVERITIES, AlarmEvent

from . import schema
from .records import AcceptNote, FeedCount, Feed, HourCount, Incident, ModelRecord, Note, RejectCount, StoredEvent

_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)
_IN_CHUNK = 500


def glob_to_like(pattern: str) -> tuple[str, bool]:
    """An SQL LIKE pattern (escape ``\\``) matching a superset of the glob.

    Returns
    -------
    like : str
        ``*`` becomes ``%``, ``?`` and any ``[...]`` class become ``_``.
    exact : bool
        False when the LIKE is only a prefilter (a ``[...]`` class was
        present). Callers always confirm with :func:`fnmatch.fnmatchcase`
        anyway, because SQLite's LIKE ignores ASCII case and PostgreSQL's
        does not.
    """
    out: list[str] = []
    exact = True
    i = 0
    while i < len(pattern):
        ch = pattern[i]
        if ch == "*":
            out.append("%")
        elif ch == "?":
            out.append("_")
        elif ch == "[":
            close = pattern.find("]", i + 2 if pattern[i + 1 : i + 2] in ("!", "]") else i + 1)
            if close == -1:
                out.append("[")
            else:
                out.append("_")
                exact = False
                i = close
        elif ch in "%_\\":
            out.append("\\" + ch)
        else:
            out.append(ch)
        i += 1
    return "".join(out), exact


def _to_event(r: Any) -> AlarmEvent:
    return AlarmEvent(
        feed_id=r.feed_id,
        rule=r.rule,
        severity=r.severity,
        start=r.start_at,
        end=r.end_at,
        peak_abs_z=r.peak_abs_z,
        value_at_onset=r.value_at_onset,
        forecast_at_onset=r.forecast_at_onset,
        lower_at_onset=r.lower_at_onset,
        upper_at_onset=r.upper_at_onset,
        parameters=r.parameters,
        model_version=r.model_version,
        detail=r.detail,
        caution=r.caution,
        incident_start=r.incident_start,
    )


def _to_note(r: Any) -> Note:
    return Note(
        id=r.id,
        event_id=r.event_id,
        feed_id=r.feed_id,
        kind=r.kind,
        operator=r.operator,
        text=r.text,
        at=r.at,
        expires_at=r.expires_at,
    )


def _chunks(seq: Sequence[int], n: int) -> Iterable[Sequence[int]]:
    for i in range(0, len(seq), n):
        yield seq[i : i + n]


def notes_for(conn: Connection, event_ids: Sequence[int]) -> dict[int, list[Note]]:
    """Notes of the given events, oldest first, keyed by event id."""
    n = schema.event_notes
    out: dict[int, list[Note]] = defaultdict(list)
    for chunk in _chunks(list(event_ids), _IN_CHUNK):
        rows = conn.execute(select(n).where(n.c.event_id.in_(chunk)).order_by(n.c.at, n.c.id))
        for r in rows:
            out[r.event_id].append(_to_note(r))
    return out


def _stored(conn: Connection, rows: Sequence[Any]) -> list[StoredEvent]:
    notes = notes_for(conn, [r.id for r in rows])
    return [
        StoredEvent(
            id=r.id,
            event=_to_event(r),
            created_at=r.created_at,
            updated_at=r.updated_at,
            notes=tuple(notes.get(r.id, ())),
        )
        for r in rows
    ]


def _acked(event_id_col: Any) -> Any:
    n = schema.event_notes
    return exists().where(and_(n.c.event_id == event_id_col, n.c.kind == "ack"))


def list_events(
    conn: Connection,
    *,
    since: datetime | None = None,
    until: datetime | None = None,
    feed_pattern: str | None = None,
    rule: str | None = None,
    severity: str | None = None,
    unacked: bool | None = None,
    limit: int | None = None,
) -> list[StoredEvent]:
    """Events with ``since <= start < until``, oldest first, with their notes.

    ``feed_pattern`` is a case-sensitive shell glob (``*``, ``?``, ``[...]``)
    on the feed id. ``unacked=True`` keeps events without an acknowledgement,
    ``False`` those with one, None both. ``limit`` keeps the first rows.
    """
    if severity is not None and severity not in SEVERITIES:
        raise ValueError(f"severity must be one of {SEVERITIES}, got {severity!r}")
    ev = schema.events
    q = select(ev)
    if since is not None:
        q = q.where(ev.c.start_at >= since)
    if until is not None:
        q = q.where(ev.c.start_at < until)
    if rule is not None:
        q = q.where(ev.c.rule == rule)
    if severity is not None:
        q = q.where(ev.c.severity == severity)
    if unacked is True:
        q = q.where(~_acked(ev.c.id))
    elif unacked is False:
        q = q.where(_acked(ev.c.id))
    if feed_pattern is not None:
        like, _ = glob_to_like(feed_pattern)
        q = q.where(ev.c.feed_id.like(like, escape="\\"))
    q = q.order_by(ev.c.start_at, ev.c.id)
    if limit is not None and feed_pattern is None:
        q = q.limit(limit)
    rows = conn.execute(q).all()
    if feed_pattern is not None:
        rows = [r for r in rows if fnmatch.fnmatchcase(r.feed_id, feed_pattern)]
        if limit is not None:
            rows = rows[:limit]
    return _stored(conn, rows)


def get_event(conn: Connection, event_id: int) -> StoredEvent | None:
    ev = schema.events
    rows = conn.execute(select(ev).where(ev.c.id == event_id)).all()
    return _stored(conn, rows)[0] if rows else None


def standing_events(conn: Connection, now: datetime, older_than_h: float = 24.0) -> list[StoredEvent]:
    """Active events (no end) that started at or before ``now - older_than_h``."""
    ev = schema.events
    cutoff = now - timedelta(hours=older_than_h)
    rows = conn.execute(
        select(ev).where(ev.c.end_at.is_(None), ev.c.start_at <= cutoff).order_by(ev.c.start_at, ev.c.id)
    ).all()
    return _stored(conn, rows)


def _hour_floor(t: datetime) -> int:
    return schema.start_hour_of((t - _EPOCH).total_seconds())


def _hour_ceil(t: datetime) -> int:
    h = _hour_floor(t)
    return h if _EPOCH + timedelta(hours=h) == t else h + 1


def alarm_counts_per_hour(
    conn: Connection, since: datetime, until: datetime, severity: str | None = None
) -> list[HourCount]:
    """Events started per UTC hour, for every hour overlapping ``[since, until)``.

    Whole hours are counted (``since`` is floored to its hour, ``until``
    rounded up), hours without events included with a count of 0. The
    query is an index-only range scan of ``ix_events_hour``.
    """
    if severity is not None and severity not in SEVERITIES:
        raise ValueError(f"severity must be one of {SEVERITIES}, got {severity!r}")
    ev = schema.events
    h0, h1 = _hour_floor(since), _hour_ceil(until)
    q = select(ev.c.start_hour, func.count()).where(ev.c.start_hour >= h0, ev.c.start_hour < h1)
    if severity is not None:
        q = q.where(ev.c.severity == severity)
    q = q.group_by(ev.c.start_hour)
    counts = dict(conn.execute(q).all())
    return [HourCount(_EPOCH + timedelta(hours=h), int(counts.get(h, 0))) for h in range(h0, h1)]


def alarm_counts_per_feed(conn: Connection, since: datetime, until: datetime) -> list[FeedCount]:
    """Events started in ``[since, until)`` per feed, most first (ties by feed id)."""
    ev = schema.events
    n = func.count().label("n")
    q = (
        select(ev.c.feed_id, n)
        .where(ev.c.start_at >= since, ev.c.start_at < until)
        .group_by(ev.c.feed_id)
        .order_by(n.desc(), ev.c.feed_id)
    )
    return [FeedCount(f, int(c)) for f, c in conn.execute(q).all()]


def shelved_feeds(conn: Connection, now: datetime) -> list[Note]:
    """The shelving note in force per feed, for feeds shelved at ``now``.

    The most recent shelving note of a feed (by ``at``, then id) decides:
    a new note with an expiry at or before ``now`` ends an earlier shelving.
    """
    n = schema.event_notes
    rows = conn.execute(
        select(n).where(n.c.kind == "shelve", n.c.at <= now).order_by(n.c.feed_id, n.c.at, n.c.id)
    ).all()
    latest: dict[str, Any] = {}
    for r in rows:
        latest[r.feed_id] = r
    return [_to_note(r) for r in latest.values() if r.expires_at > now]


def shelving_notes(conn: Connection) -> list[Note]:
    """Every shelving note (the audit trail keeps them all), by feed, then time."""
    n = schema.event_notes
    rows = conn.execute(select(n).where(n.c.kind == "shelve").order_by(n.c.feed_id, n.c.at, n.c.id)).all()
    return [_to_note(r) for r in rows]


def feeds(conn: Connection) -> list[Feed]:
    f = schema.feeds
    return [
        Feed(r.feed_id, r.unit, r.interval_s, r.source, r.created_at)
        for r in conn.execute(select(f).order_by(f.c.feed_id))
    ]


def _to_model(r: Any) -> ModelRecord:
    return ModelRecord(
        feed_id=r.feed_id,
        version=r.version,
        order=r.model_order,
        parameters=r.parameters,
        thresholds=r.thresholds,
        fit_stats=r.fit_stats,
        fitted_at=r.fitted_at,
        window_start=r.window_start,
        window_end=r.window_end,
        reason=r.reason,
        recorded_at=r.recorded_at,
    )


def latest_models(conn: Connection) -> dict[str, ModelRecord]:
    """The highest model version of each feed."""
    m = schema.models
    top = select(m.c.feed_id, func.max(m.c.version).label("v")).group_by(m.c.feed_id).subquery()
    q = select(m).join(top, and_(m.c.feed_id == top.c.feed_id, m.c.version == top.c.v)).order_by(m.c.feed_id)
    return {r.feed_id: _to_model(r) for r in conn.execute(q)}


def models_of(conn: Connection, feed_id: str) -> list[ModelRecord]:
    m = schema.models
    return [_to_model(r) for r in conn.execute(select(m).where(m.c.feed_id == feed_id).order_by(m.c.version))]


def reject_counts(conn: Connection) -> list[RejectCount]:
    rc = schema.reject_counts
    return [
        RejectCount(r.source, r.reason, int(r.count), r.first_seen, r.last_seen)
        for r in conn.execute(select(rc).order_by(rc.c.source, rc.c.reason))
    ]


def reject_samples(conn: Connection, source: str | None = None, reason: str | None = None) -> list[RejectSample]:
    """The kept samples, oldest first."""
    rs = schema.reject_samples
    q = select(rs)
    if source is not None:
        q = q.where(rs.c.source == source)
    if reason is not None:
        q = q.where(rs.c.reason == reason)
    return [
        RejectSample(r.source, r.reason, r.location, r.detail, bytes(r.raw), r.seen_at)
        for r in conn.execute(q.order_by(rs.c.id))
    ]


def load_offsets(conn: Connection, source: str) -> dict[str, SourceOffset]:
    so = schema.source_offsets
    return {
        r.path: SourceOffset(r.source, r.path, r.device, r.inode, int(r.offset_bytes), r.updated_at)
        for r in conn.execute(select(so).where(so.c.source == source))
    }


def load_checkpoints(conn: Connection) -> dict[str, tuple[bytes, int]]:
    cp = schema.checkpoints
    return {r.feed_id: (bytes(r.state), int(r.model_version)) for r in conn.execute(select(cp))}



def accept_notes_after(conn: Connection, note_id: int) -> list[AcceptNote]:
    """The ``accept`` notes with an id above ``note_id``, oldest first, with their event's key."""
    n, ev = schema.event_notes, schema.events
    rows = conn.execute(
        select(n.c.id, n.c.event_id, n.c.feed_id, n.c.operator, n.c.text, n.c.at, ev.c.rule, ev.c.start_at)
        .join(ev, ev.c.id == n.c.event_id)
        .where(n.c.kind == "accept", n.c.id > note_id)
        .order_by(n.c.id)
    ).all()
    return [AcceptNote(note_id=r.id, event_id=r.event_id, feed_id=r.feed_id, rule=r.rule, event_start=r.start_at,
                       operator=r.operator, text=r.text, at=r.at) for r in rows]


def group_incidents(stored: Sequence[StoredEvent]) -> list[Incident]:
    """Events grouped by ``(feed_id, incident_start)``, in the order of each incident's first event."""
    groups: dict[tuple[str, datetime], list[StoredEvent]] = {}
    for se in sorted(stored, key=lambda e: (e.event.start, e.id)):
        groups.setdefault((se.event.feed_id, se.incident_start), []).append(se)
    out = []
    for (feed_id, start), members in groups.items():
        ends = [m.event.end for m in members]
        peaks = [m.event.peak_abs_z for m in members if m.event.peak_abs_z == m.event.peak_abs_z]
        out.append(Incident(
            id=members[0].id, feed_id=feed_id, start=start,
            end=None if any(e is None for e in ends) else max(ends),
            rules=tuple(dict.fromkeys(m.event.rule for m in members)),
            severity=max((m.event.severity for m in members), key=SEVERITIES.index),
            peak_abs_z=max(peaks) if peaks else float("nan"),
            events=tuple(members)))
    out.sort(key=lambda i: (i.start, i.id))
    return out
