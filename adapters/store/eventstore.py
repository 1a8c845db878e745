"""The event store: the service's write side, and the store that is both sides.

Writes of the service loop are *staged* (``stage_event``, ``stage_checkpoint``,
``stage_offset``, ``stage_reject``) and committed together by :meth:`EventWriter.flush`
in one short transaction: the events, the checkpoints and the CSV offsets of
the rows that produced them become durable at once, or not at all. The loop
calls :meth:`EventWriter.flush_due` every turn and flushes when it says so
(every ``flush_interval_s``, or as soon as ``max_staged_events`` are staged).
Model records are written at once, each in its own transaction.

Operator notes and the reads of the review commands are the other side,
:class:`~.reads.EventQueries`. :class:`EventStore` is both, and
:func:`open_store` opens one.

An ``EventStore`` may be shared between threads (staging and flushing are
serialised by a lock), but each process should open its own.
"""

from __future__ import annotations

import math
import numbers
import threading
import time
from datetime import datetime
from typing import Any, Callable

from sqlalchemy import Engine, func, select

from leadline.adapters.ports import RejectSample, SourceOffset, StoreTime
from leadline.detector.errors import StoreError
from leadline.detector.events import AlarmEvent
from leadline.detector.evidence import EvidenceRecord

from . import schema
from .connect import create_store_engine, read_transaction, resolve_url, write_transaction
from .handle import StoreHandle, require_text as _require_text, require_utc as _require_utc
from .migrations import ensure_schema
from .journal import JournalState, bytes_of_value, journal_counts, read_journal
from .reads import EventQueries
from .dialects import insert_for
from .feed_status import FeedStatusRow, Heartbeat
from .queries import shelved_feeds
from .queries import accept_notes_after
from .records import AcceptNote
from .timing import StoreTiming
from .writer import WriteBuffer, write_buffer


class EventWriter(StoreHandle):
    """The service's side of the store: staged writes committed in one transaction.

    The :class:`~leadline.adapters.ports.EventSink` of the service loop.

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
        super().__init__(engine, clock=clock)
        self.flush_interval_s = float(flush_interval_s)
        self.max_staged_events = int(max_staged_events)
        self._buffer = WriteBuffer()
        self._lock = threading.RLock()
        self._last_flush = time.monotonic()
        self._feed_keys: dict[str, int] = {}
        self._next_seq: int | None = None
        self._timing = StoreTiming()

    # ------------------------------------------------------------------ info
    @property
    def staged_events(self) -> int:
        """Distinct events staged and not yet flushed."""
        return len(self._buffer.events)

    @property
    def staged_items(self) -> int:
        """Everything staged: events, checkpoints, offsets, reject tallies."""
        return len(self._buffer)

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

    def stage_reject_sample(self, sample: RejectSample) -> None:
        """Keep a rejected record as a sample only; its count comes by :meth:`stage_reject_count`."""
        self._check_open()
        _require_utc("RejectSample.seen_at", sample.seen_at)
        with self._lock:
            self._buffer.add_reject_sample(sample)

    def stage_reject_count(self, source: str, reason: str, count: int, first_seen: datetime,
                           last_seen: datetime) -> None:
        """Add ``count`` rejects of (source, reason) to the stored count at the next flush (exact)."""
        self._check_open()
        if not isinstance(count, int) or isinstance(count, bool) or count < 0:
            raise StoreError(f"reject count of {source!r}/{reason!r} must be an int >= 0, got {count!r}")
        first = _require_utc("first_seen", first_seen)
        last = _require_utc("last_seen", last_seen)
        with self._lock:
            self._buffer.add_reject_count(source, reason, count, first, last)

    def stage_feed_status(self, row: FeedStatusRow) -> None:
        """Stage a feed's status (the latest staged one per feed wins); it commits with the next flush."""
        self._check_open()
        _require_text("feed_id", row.feed_id)
        if row.last_reading_at is not None:
            _require_utc("last_reading_at", row.last_reading_at)
        with self._lock:
            self._buffer.feed_status[row.feed_id] = row

    def shelving_in_force(self, now: datetime) -> dict[str, datetime]:
        """The feeds shelved at ``now`` (UTC) and the end of each shelving, read from the notes."""
        self._check_open()
        now = _require_utc("now", now)
        return {n.feed_id: n.expires_at for n in self._read("reading shelving", shelved_feeds, now)}

    def stage_heartbeat(self, beat: Heartbeat) -> None:
        """Stage the service's heartbeat (the latest staged one wins)."""
        self._check_open()
        _require_text("service", beat.service)
        _require_utc("started_at", beat.started_at)
        _require_utc("beat_at", beat.beat_at)
        with self._lock:
            self._buffer.heartbeat = beat
    def stage_mark(self, name: str, value: int) -> None:
        """Stage a named service mark (such as the last accept note applied); it commits with the events."""
        self._check_open()
        _require_text("mark name", name)
        if isinstance(value, bool) or not isinstance(value, numbers.Integral):
            raise StoreError(f"service mark {name!r} must be an int, got {value!r}")
        with self._lock:
            self._buffer.marks[name] = int(value)

    def mark(self, name: str) -> int | None:
        """The committed value of a service mark, or None."""
        self._check_open()
        sm = schema.service_marks
        with read_transaction(self._engine, f"reading service mark {name!r}") as conn:
            value = conn.execute(select(sm.c.value).where(sm.c.name == name)).scalar()
        return None if value is None else int(value)

    def accept_notes_after(self, note_id: int) -> list[AcceptNote]:
        """The committed ``accept`` notes with an id above ``note_id``, oldest first, with their event's key."""
        self._check_open()
        with read_transaction(self._engine, "reading accept notes") as conn:
            return accept_notes_after(conn, int(note_id))

    # ---------------------------------------------------------------- journal
    def open_journal(self) -> JournalState:
        """Read the journal (:mod:`.journal`): snapshots, kept rows, feed keys; staging continues after it."""
        self._check_open()
        with self._lock:
            state = self._read("reading the journal", read_journal, schema.metadata)
            self._feed_keys = dict(state.feed_keys)
            self._next_seq = state.next_seq
            return state

    def stage_reading(self, feed_id: str, epoch_s: float, value: float) -> int:
        """Journal one accepted reading; return its journal position (commits with the next flush)."""
        with self._lock:
            if self._next_seq is None:
                self.open_journal()
            j = self._buffer.journal
            key = self._feed_keys.get(feed_id)
            if key is None:
                key = len(self._feed_keys) + 1
                self._feed_keys[feed_id] = key
                j.new_feeds[key] = feed_id
            seq = self._next_seq
            self._next_seq += 1
            j.rows.append((seq, key, float(epoch_s), bytes_of_value(value)))
            j.counts[key] = j.counts.get(key, 0) + 1
            j.last_t[key] = max(j.last_t.get(key, float(epoch_s)), float(epoch_s))
            return seq

    def stage_snapshot(self, feed_id: str, journal_seq: int, state: bytes, model_version: int) -> None:
        """Stage a feed's snapshot covering the journal up to ``journal_seq`` (the feed must be journaled)."""
        with self._lock:
            key = self._feed_keys.get(feed_id)
            if key is None:
                raise StoreError(f"snapshot of {feed_id!r}: the feed has no journaled reading")
            self._buffer.journal.snapshots[key] = (int(journal_seq), int(model_version), bytes(state))

    def journal_counts(self) -> dict[str, int]:
        """``{feed_id: readings ever journaled}`` (committed)."""
        return self._read("counting the journal", journal_counts, schema.metadata)

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
            with self._timing.flush(), write_transaction(self._engine,
                                                         f"flushing {self.staged_events} staged events") as conn:
                n = write_buffer(conn, self._buffer, self._clock(), self._timing)
            self._buffer = WriteBuffer()
            self._last_flush = time.monotonic()
            return n

    def take_store_time(self) -> StoreTime:
        """The flushes' time per part since the last call, then reset (:mod:`.timing`)."""
        with self._lock:
            return self._timing.take()

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
            super().close()


class EventStore(EventWriter, EventQueries):
    """Events, notes, models, checkpoints, offsets and rejects in one database.

    Build it with :func:`open_store`. It is both sides of the store: the
    service writes through :class:`EventWriter` (its
    :class:`~leadline.adapters.ports.EventSink`), the review commands read
    through :class:`~.reads.EventQueries`. Parameters: see :class:`EventWriter`.
    """


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
