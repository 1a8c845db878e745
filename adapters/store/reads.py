"""The review side of the event store: what the review commands read and append.

:class:`EventQueries` runs the read queries of :mod:`.queries` in read
transactions (on SQLite in WAL mode they never wait for the writer), and
appends the operators' notes (acknowledgements, comments, shelving), each
at once in its own transaction. Notes are never edited or deleted (the
database refuses it). The service never calls these; it writes through
:class:`~leadline.adapters.ports.EventSink`.
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import select

from leadline.adapters.ports import RejectSample, SourceOffset
from leadline.detector.errors import StoreError

from leadline.detector.evidence import EvidenceRecord

from . import queries, schema
from .evidence import read_evidence
from .feed_status import FeedStatusRow, Heartbeat, read_feed_status, read_heartbeats
from .connect import write_transaction
from .handle import StoreHandle, require_text as _require_text, require_utc as _require_utc
from .records import FeedCount, Feed, HourCount, ModelRecord, Note, RejectCount, StoredEvent

_NOTE_KINDS = ("ack", "comment", "accept")


class EventQueries(StoreHandle):
    """Listings, counts, models and rejects; and the operators' notes.

    Committed data only: what the service has staged appears after its
    flush. Open one with :func:`~.eventstore.open_store` (an
    :class:`~.eventstore.EventStore` is also an ``EventQueries``).
    """

    # ----------------------------------------------------------- operator notes
    def add_note(self, event_id: int, kind: str, operator: str, text: str, at: datetime | None = None) -> int:
        """Append an acknowledgement (``kind="ack"``), a comment or an ``accept`` note to an event.

        An ``accept`` note accepts the event's level shift as the feed's new
        normal; the running service applies it (its text is required).

        Notes are never edited or deleted (the database refuses it). Returns
        the note's id. Raises :class:`StoreError` for an unknown event id.
        """
        self._check_open()
        if kind not in _NOTE_KINDS:
            raise StoreError(f"note kind must be one of {_NOTE_KINDS} (shelving: use shelve()), got {kind!r}")
        _require_text("operator", operator)
        if kind in ("comment", "accept"):
            _require_text(f"{kind} text", text)
        at = _require_utc("at", at) if at is not None else self._clock()
        ev, n = schema.events, schema.event_notes
        with write_transaction(self._engine, f"adding a note to event {event_id}") as conn:
            feed_id = conn.execute(select(ev.c.feed_id).where(ev.c.id == int(event_id))).scalar()
            if feed_id is None:
                raise StoreError(f"no event with id {event_id} in {self.url}")
            res = conn.execute(
                n.insert().values(
                    event_id=int(event_id), feed_id=feed_id, kind=kind, operator=operator, text=text or "", at=at
                )
            )
            return int(res.inserted_primary_key[0])

    def shelve(
        self, feed_id: str, operator: str, text: str, until: datetime, at: datetime | None = None
    ) -> int:
        """Shelve a feed until ``until``: append a shelving note; returns its id.

        The most recent shelving note of a feed decides (see
        :meth:`shelved_feeds`), so shelving again with ``until`` at or before
        now ends a shelving early; nothing is edited.
        """
        self._check_open()
        _require_text("operator", operator)
        _require_text("shelving reason (text)", text)
        until = _require_utc("until", until)
        at = _require_utc("at", at) if at is not None else self._clock()
        if until < at:
            raise StoreError(f"shelving of {feed_id!r}: until {until.isoformat()} is before {at.isoformat()}")
        f, n = schema.feeds, schema.event_notes
        with write_transaction(self._engine, f"shelving feed {feed_id!r}") as conn:
            if conn.execute(select(f.c.feed_id).where(f.c.feed_id == feed_id)).scalar() is None:
                raise StoreError(f"cannot shelve unknown feed {feed_id!r} in {self.url}")
            res = conn.execute(
                n.insert().values(
                    event_id=None, feed_id=feed_id, kind="shelve", operator=operator, text=text, at=at,
                    expires_at=until,
                )
            )
            return int(res.inserted_primary_key[0])

    # ------------------------------------------------------------------ reads
    def load_offsets(self, source: str) -> dict[str, SourceOffset]:
        """The committed offsets of one source, keyed by file path."""
        return self._read(f"loading offsets of {source!r}", queries.load_offsets, source)

    def load_checkpoints(self) -> dict[str, tuple[bytes, int]]:
        """``{feed_id: (state bytes, model_version)}`` as last committed."""
        return self._read("loading checkpoints", queries.load_checkpoints)

    def events(
        self,
        since: datetime | None = None,
        until: datetime | None = None,
        feed_pattern: str | None = None,
        rule: str | None = None,
        severity: str | None = None,
        unacked: bool | None = None,
        limit: int | None = None,
    ) -> list[StoredEvent]:
        """Events with ``since <= start < until``, oldest first, with their notes.

        ``feed_pattern`` is a case-sensitive glob on the feed id;
        ``unacked=True`` keeps unacknowledged events, ``False`` acknowledged
        ones. Committed events only (staged ones appear after :meth:`flush`).
        """
        since = None if since is None else _require_utc("since", since)
        until = None if until is None else _require_utc("until", until)
        try:
            return self._read(
                "listing events",
                queries.list_events,
                since=since,
                until=until,
                feed_pattern=feed_pattern,
                rule=rule,
                severity=severity,
                unacked=unacked,
                limit=limit,
            )
        except ValueError as exc:
            raise StoreError(str(exc)) from exc

    def event(self, event_id: int) -> StoredEvent | None:
        """One event by id, with its notes, or None."""
        return self._read(f"reading event {event_id}", queries.get_event, int(event_id))

    def standing_events(self, now: datetime, older_than_h: float = 24.0) -> list[StoredEvent]:
        """Events still active that started at least ``older_than_h`` hours before ``now``."""
        return self._read("listing standing events", queries.standing_events, _require_utc("now", now), older_than_h)

    def alarm_counts_per_hour(
        self, since: datetime, until: datetime, severity: str | None = None
    ) -> list[HourCount]:
        """Events started per UTC hour over the whole hours overlapping
        ``[since, until)``, zero-count hours included."""
        since, until = _require_utc("since", since), _require_utc("until", until)
        try:
            return self._read("counting alarms per hour", queries.alarm_counts_per_hour, since, until, severity)
        except ValueError as exc:
            raise StoreError(str(exc)) from exc

    def alarm_counts_per_feed(self, since: datetime, until: datetime) -> list[FeedCount]:
        """Events started in ``[since, until)`` per feed, most first."""
        since, until = _require_utc("since", since), _require_utc("until", until)
        return self._read("counting alarms per feed", queries.alarm_counts_per_feed, since, until)

    def shelved_feeds(self, now: datetime) -> list[Note]:
        """The shelving note in force of every feed shelved at ``now``."""
        return self._read("listing shelved feeds", queries.shelved_feeds, _require_utc("now", now))

    def shelving_notes(self) -> list[Note]:
        """Every shelving note ever written, by feed, then time (the audit trail of shelving)."""
        return self._read("reading shelving notes", queries.shelving_notes)

    def reject_counts(self) -> list[RejectCount]:
        return self._read("reading reject counts", queries.reject_counts)

    def reject_samples(self, source: str | None = None, reason: str | None = None) -> list[RejectSample]:
        """The kept samples of rejected input, oldest first."""
        return self._read("reading reject samples", queries.reject_samples, source, reason)

    def evidence(self, keys: list[tuple[str, str, datetime]]) -> dict[tuple[str, str, datetime], EvidenceRecord]:
        """The stored evidence of the given event keys ``(feed_id, rule, start)``; missing keys are absent."""
        return self._read("reading evidence", read_evidence, list(keys))

    def feeds(self) -> list[Feed]:
        return self._read("listing feeds", queries.feeds)

    def feed_status(self) -> dict[str, FeedStatusRow]:
        """Each feed's status as the service last committed it, by feed id."""
        return self._read("reading feed status", read_feed_status)

    def heartbeats(self) -> list[Heartbeat]:
        """The heartbeat of every service that wrote to this store, latest beat first."""
        return self._read("reading service heartbeats", read_heartbeats)

    def latest_models(self) -> dict[str, ModelRecord]:
        """The latest model record of each feed."""
        return self._read("reading models", queries.latest_models)

    def models(self, feed_id: str) -> list[ModelRecord]:
        """Every model version of one feed, oldest first."""
        return self._read(f"reading models of {feed_id!r}", queries.models_of, feed_id)
