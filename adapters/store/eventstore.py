"""The event store: the one object the service and the CLI talk to.

Writes of the service loop are *staged* (``stage_event``, ``stage_checkpoint``,
``stage_offset``, ``stage_reject``) and committed together by :meth:`EventStore.flush`
in one short transaction: the events, the checkpoints and the CSV offsets of
the rows that produced them become durable at once, or not at all. The loop
calls :meth:`EventStore.flush_due` every turn and flushes when it says so
(every ``flush_interval_s``, or as soon as ``max_staged_events`` are staged).

Operator actions (``add_note``, ``shelve``) and model records are written
at once, each in its own transaction. Reads (``events``, counts) run in read
transactions, which on SQLite in WAL mode never wait for the writer.

An ``EventStore`` may be shared between threads (staging and flushing are
serialised by a lock), but each process should open its own.
"""

from __future__ import annotations

import math
import numbers
import threading
import time
from datetime import datetime, timezone
from typing import Any, Callable

from sqlalchemy import Engine, func, select

from leadline.adapters.sources.base import RejectSample, SourceOffset
from leadline.detector.errors import StoreError
from leadline.detector.events import AlarmEvent
from leadline.detector.evidence import EvidenceRecord

from . import queries, schema
from .evidence import read_evidence
from .connect import create_store_engine, read_transaction, resolve_url, safe_url, translate_errors, write_transaction
from .migrations import ensure_schema
from .records import FeedCount, Feed, HourCount, ModelRecord, Note, RejectCount, StoredEvent
from .writer import WriteBuffer, insert_for, write_buffer

_NOTE_KINDS = ("ack", "comment")


def _utc_now() -> datetime:
    return datetime.now(timezone.utc)


def _require_utc(name: str, value: Any) -> datetime:
    if not isinstance(value, datetime) or value.tzinfo is None or value.utcoffset() is None:
        raise StoreError(f"{name} must be a timezone-aware UTC datetime, got {value!r}")
    return value.astimezone(timezone.utc)


def _require_text(name: str, value: Any) -> str:
    if not isinstance(value, str) or not value.strip():
        raise StoreError(f"{name} must be a non-empty string, got {value!r}")
    return value


class EventStore:
    """Events, notes, models, checkpoints, offsets and rejects in one database.

    Build it with :func:`open_store`.

    Parameters
    ----------
    engine : sqlalchemy.Engine
        From :func:`.connect.create_store_engine`, schema already checked.
    flush_interval_s : float
        :meth:`flush_due` is True once this long has passed since the last
        flush (and something is staged). Default 1 s.
    max_staged_events : int
        :meth:`flush_due` is True as soon as this many distinct events are
        staged. Default 500.
    clock : callable, optional
        Returns the current UTC time (``created_at``, note times); for tests.
    """

    def __init__(
        self,
        engine: Engine,
        *,
        flush_interval_s: float = 1.0,
        max_staged_events: int = 500,
        clock: Callable[[], datetime] | None = None,
    ) -> None:
        if flush_interval_s <= 0 or not math.isfinite(flush_interval_s):
            raise StoreError(f"flush_interval_s must be a positive number of seconds, got {flush_interval_s}")
        if max_staged_events < 1:
            raise StoreError(f"max_staged_events must be >= 1, got {max_staged_events}")
        self._engine = engine
        self.flush_interval_s = float(flush_interval_s)
        self.max_staged_events = int(max_staged_events)
        self._clock = clock or _utc_now
        self._buffer = WriteBuffer()
        self._lock = threading.RLock()
        self._last_flush = time.monotonic()
        self._closed = False

    # ------------------------------------------------------------------ info
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

    @property
    def staged_events(self) -> int:
        """Distinct events staged and not yet flushed."""
        return len(self._buffer.events)

    @property
    def staged_items(self) -> int:
        """Everything staged: events, checkpoints, offsets, reject tallies."""
        return len(self._buffer)

    def _check_open(self) -> None:
        if self._closed:
            raise StoreError(f"the event store {self.url} is closed")

    # ----------------------------------------------------------- immediate writes
    def ensure_feed(
        self, feed_id: str, unit: str | None = None, interval_s: float | None = None, source: str | None = None
    ) -> None:
        """Create the feed's row, or update the fields given (None keeps a field)."""
        self._check_open()
        _require_text("feed_id", feed_id)
        f = schema.feeds
        with write_transaction(self._engine, f"recording feed {feed_id!r}") as conn:
            stmt = insert_for(conn)(f).values(
                feed_id=feed_id, unit=unit, interval_s=interval_s, source=source, created_at=self._clock()
            )
            new = stmt.excluded
            stmt = stmt.on_conflict_do_update(
                index_elements=[f.c.feed_id],
                set_={
                    "unit": func.coalesce(new.unit, f.c.unit),
                    "interval_s": func.coalesce(new.interval_s, f.c.interval_s),
                    "source": func.coalesce(new.source, f.c.source),
                },
            )
            conn.execute(stmt)

    def record_model(
        self,
        feed_id: str,
        order: str,
        parameters: dict[str, Any],
        thresholds: dict[str, Any],
        fit_stats: dict[str, Any],
        fitted_at: datetime,
        window_start: datetime,
        window_end: datetime,
        reason: str,
    ) -> int:
        """Record one fit and return its version: 1 for the feed's first, then 2, 3, ...

        The feed's row is created if missing. Committed at once.
        """
        self._check_open()
        _require_text("feed_id", feed_id)
        _require_text("order", order)
        _require_text("reason", reason)
        times = {
            "fitted_at": _require_utc("fitted_at", fitted_at),
            "window_start": _require_utc("window_start", window_start),
            "window_end": _require_utc("window_end", window_end),
        }
        if times["window_end"] < times["window_start"]:
            raise StoreError(f"model of {feed_id!r}: window_end {window_end} is before window_start {window_start}")
        f, m = schema.feeds, schema.models
        now = self._clock()
        with write_transaction(self._engine, f"recording a model of {feed_id!r}") as conn:
            conn.execute(
                insert_for(conn)(f)
                .values(feed_id=feed_id, created_at=now)
                .on_conflict_do_nothing(index_elements=[f.c.feed_id])
            )
            # PostgreSQL: lock the feed row so two fits cannot take one number.
            conn.execute(select(f.c.feed_id).where(f.c.feed_id == feed_id).with_for_update())
            last = conn.execute(select(func.max(m.c.version)).where(m.c.feed_id == feed_id)).scalar()
            version = 1 if last is None else int(last) + 1
            conn.execute(
                m.insert().values(
                    feed_id=feed_id,
                    version=version,
                    model_order=order,
                    parameters=parameters,
                    thresholds=thresholds,
                    fit_stats=fit_stats,
                    reason=reason,
                    recorded_at=now,
                    **times,
                )
            )
        return version

    def add_note(self, event_id: int, kind: str, operator: str, text: str, at: datetime | None = None) -> int:
        """Append an acknowledgement (``kind="ack"``) or comment to an event.

        Notes are never edited or deleted (the database refuses it). Returns
        the note's id. Raises :class:`StoreError` for an unknown event id.
        """
        self._check_open()
        if kind not in _NOTE_KINDS:
            raise StoreError(f"note kind must be one of {_NOTE_KINDS} (shelving: use shelve()), got {kind!r}")
        _require_text("operator", operator)
        if kind == "comment":
            _require_text("comment text", text)
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

    # ---------------------------------------------------------------- staging
    def stage_event(self, ev: AlarmEvent) -> None:
        """Stage an event; copies with the same ``(feed_id, rule, start)`` merge
        (see :mod:`.writer`), in the buffer and against the stored row."""
        self._check_open()
        if not isinstance(ev, AlarmEvent):
            raise StoreError(f"stage_event expects an AlarmEvent, got {type(ev).__name__}")
        with self._lock:
            try:
                self._buffer.add_event(ev)
            except (TypeError, ValueError) as exc:
                raise StoreError(
                    f"event {ev.feed_id!r}/{ev.rule!r} at {ev.start.isoformat()} cannot be stored: "
                    f"its parameters are not JSON-serialisable ({exc})"
                ) from exc

    def stage_evidence(self, record: EvidenceRecord) -> None:
        """Stage the evidence of an episode (:mod:`.evidence`); it commits with the events."""
        self._check_open()
        if not isinstance(record, EvidenceRecord):
            raise StoreError(f"stage_evidence expects an EvidenceRecord, got {type(record).__name__}")
        with self._lock:
            self._buffer.add_evidence(record)

    def stage_checkpoint(self, feed_id: str, state: bytes, model_version: int) -> None:
        """Stage a feed's stream state (the latest staged one per feed wins)."""
        self._check_open()
        _require_text("feed_id", feed_id)
        if not isinstance(state, (bytes, bytearray, memoryview)):
            raise StoreError(f"checkpoint state of {feed_id!r} must be bytes, got {type(state).__name__}")
        if isinstance(model_version, bool) or not isinstance(model_version, numbers.Integral):
            raise StoreError(f"checkpoint model_version of {feed_id!r} must be an int, got {model_version!r}")
        with self._lock:
            self._buffer.add_checkpoint(feed_id, bytes(state), model_version)

    def stage_offset(self, off: SourceOffset) -> None:
        """Stage a file's committed offset (the latest staged one per file wins).

        Stage it with the events of the rows it covers: they commit together.
        """
        self._check_open()
        if off.offset_bytes < 0:
            raise StoreError(f"offset of {off.path!r} must be >= 0, got {off.offset_bytes}")
        _require_utc("SourceOffset.updated_at", off.updated_at)
        with self._lock:
            self._buffer.add_offset(off)

    def stage_reject(self, sample: RejectSample) -> None:
        """Count a rejected record per (source, reason) and keep it as a sample
        (only the last :data:`.writer.REJECT_SAMPLE_LIMIT` per pair are kept)."""
        self._check_open()
        _require_utc("RejectSample.seen_at", sample.seen_at)
        with self._lock:
            self._buffer.add_reject(sample)

    def flush(self) -> int:
        """Commit everything staged in ONE transaction; return the events written.

        Returns only once the transaction is committed (durable against a
        crash of this process, see :mod:`.connect` for power loss). On
        failure it raises :class:`StoreError` and keeps everything staged,
        so a later flush retries it; upserts make the retry harmless.
        """
        self._check_open()
        with self._lock:
            if not len(self._buffer):
                self._last_flush = time.monotonic()
                return 0
            with write_transaction(self._engine, f"flushing {self.staged_events} staged events") as conn:
                n = write_buffer(conn, self._buffer, self._clock())
            self._buffer = WriteBuffer()
            self._last_flush = time.monotonic()
            return n

    def flush_due(self, now_monotonic: float | None = None) -> bool:
        """True when something is staged and either ``flush_interval_s`` has
        passed since the last flush or ``max_staged_events`` are staged.

        ``now_monotonic`` is a :func:`time.monotonic` reading (default: now).
        """
        now = time.monotonic() if now_monotonic is None else now_monotonic
        with self._lock:
            if not len(self._buffer):
                return False
            if len(self._buffer.events) >= self.max_staged_events:
                return True
            return now - self._last_flush >= self.flush_interval_s

    # ------------------------------------------------------------------ reads
    def _read(self, what: str, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
        self._check_open()
        with read_transaction(self._engine, what) as conn:
            return fn(conn, *args, **kwargs)

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

    def latest_models(self) -> dict[str, ModelRecord]:
        """The latest model record of each feed."""
        return self._read("reading models", queries.latest_models)

    def models(self, feed_id: str) -> list[ModelRecord]:
        """Every model version of one feed, oldest first."""
        return self._read(f"reading models of {feed_id!r}", queries.models_of, feed_id)

    # ------------------------------------------------------------------ close
    def close(self) -> None:
        """Flush what is staged, then release the connections.

        If that last flush fails, the connections are still released and
        the :class:`StoreError` is raised: the staged items were not stored.
        """
        if self._closed:
            return
        try:
            with self._lock:
                if len(self._buffer):
                    self.flush()
        finally:
            self._closed = True
            with translate_errors("closing the store", self._engine.url):
                self._engine.dispose()

    def __enter__(self) -> "EventStore":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def open_store(
    url: str | None = None,
    *,
    path: str = "leadline.db",
    upgrade: bool = False,
    flush_interval_s: float = 1.0,
    max_staged_events: int = 500,
    busy_timeout_s: float = 10.0,
    sqlite_synchronous: str = "NORMAL",
    clock: Callable[[], datetime] | None = None,
) -> EventStore:
    """Open (and on first use create) the event store.

    Parameters
    ----------
    url : str, optional
        ``sqlite:///path.db``, a plain file path (SQLite), or
        ``postgresql+psycopg://user@host:5432/db``. To keep the tables in a
        PostgreSQL schema other than ``public``, add
        ``?options=-csearch_path%3Dmyschema``. None: the SQLite file ``path``.
    path : str
        The SQLite file used when ``url`` is None (default ``leadline.db``
        in the working directory).
    upgrade : bool
        Upgrade a database of an older schema version instead of refusing it.
    flush_interval_s, max_staged_events, clock
        See :class:`EventStore`.
    busy_timeout_s, sqlite_synchronous
        See :func:`.connect.create_store_engine`.

    Raises
    ------
    SchemaVersionError
        The database has a newer or unknown schema, or an older one and
        ``upgrade`` is False.
    StoreError
        The database cannot be reached, created or read.
    """
    parsed = resolve_url(url, path)
    engine = create_store_engine(parsed, busy_timeout_s=busy_timeout_s, sqlite_synchronous=sqlite_synchronous)
    try:
        ensure_schema(engine, upgrade=upgrade)
    except BaseException:
        engine.dispose()
        raise
    return EventStore(engine, flush_interval_s=flush_interval_s, max_staged_events=max_staged_events, clock=clock)


def upgrade_store(url: str | None = None, *, path: str = "leadline.db", busy_timeout_s: float = 10.0) -> int:
    """Upgrade a store to this build's schema version, explicitly; return it.

    Take a backup first. A database already current is left alone; a newer
    one is refused (:class:`SchemaVersionError`).
    """
    parsed = resolve_url(url, path)
    engine = create_store_engine(parsed, busy_timeout_s=busy_timeout_s)
    try:
        return ensure_schema(engine, upgrade=True)
    finally:
        engine.dispose()
