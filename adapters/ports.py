"""The ports of the service: what it needs of its inputs, its store and its outputs.

The service loop (:mod:`leadline.adapters.service.loop`) is typed against
these protocols only, never against a concrete adapter:

- :class:`Source`: an input (followed CSV files, MQTT subscriptions) that
  yields :class:`~leadline.detector.readings.Reading` objects;
- :class:`EventSink`: the store's write side, just what the service writes
  (events, CSV offsets, rejects, checkpoints, model records) and commits;
- :class:`AlarmPublisher`: an output that is told of each committed event.

The review commands read through the store's query side instead
(:class:`leadline.adapters.store.EventQueries`). The records that cross a
port (:class:`SourceOffset`, :class:`RejectSample`, :class:`FeedStatusRow`,
:class:`Heartbeat`) live here, so the store
does not import the sources nor they the store.

The service loop

1. polls readings from each source,
2. feeds them to the engine, which returns events,
3. commits the events *together with* the source's durable marks
   (:meth:`Source.durable_marks`, CSV byte offsets) in one store transaction,
4. and only then calls :meth:`Source.ack` (MQTT: PUBACK of the messages)
   and :meth:`AlarmPublisher.publish`.

So an offset or an acknowledgement never runs ahead of the committed events:
after a crash the source resumes from the last committed mark, and the
store's unique key on (feed, rule, start) absorbs any replayed reading.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any, Protocol, Sequence, runtime_checkable

from leadline.detector.events import AlarmEvent
from leadline.detector.readings import Reading

__all__ = ["ALIVE_BEATS", "STORE_TIME_PARTS", "AlarmPublisher", "EventSink", "FeedStatusRow", "Heartbeat",
           "RejectSample", "Source", "SourceOffset", "StoreTime"]


@dataclass(frozen=True, slots=True)
class SourceOffset:
    """Where a followed file has been read up to, durably.

    Attributes
    ----------
    source : str
        The configured source's name (one config entry may follow a glob).
    path : str
        The file's path when it was read.
    device, inode : int
        ``st_dev`` and ``st_ino`` of the file, to detect rotation by rename.
    offset_bytes : int
        Byte offset just past the last complete line whose readings are
        committed.
    updated_at : datetime
        UTC time the mark was taken.
    """

    source: str
    path: str
    device: int
    inode: int
    offset_bytes: int
    updated_at: datetime


@dataclass(frozen=True, slots=True)
class RejectSample:
    """One rejected input record, for the rejects table."""

    source: str
    reason: str
    where: str
    detail: str
    raw: bytes
    seen_at: datetime


#: A service is taken as alive while its last beat is younger than this many beat intervals.
ALIVE_BEATS = 3.0


@dataclass(frozen=True, slots=True)
class FeedStatusRow:
    """One feed as the service saw it at ``updated_at`` (UTC)."""

    feed_id: str
    state: str
    last_reading_at: datetime | None
    last_value: float | None
    source: str | None
    unit: str | None
    interval_s: float | None
    learning_have: int | None
    learning_need: int | None
    updated_at: datetime | None = None


@dataclass(frozen=True, slots=True)
class Heartbeat:
    """One running service: when it started, its latest beat, its process and version."""

    service: str
    started_at: datetime
    beat_at: datetime
    beat_interval_s: float
    pid: int
    version: str

    def alive(self, now: datetime) -> bool:
        """True while the last beat is younger than :data:`ALIVE_BEATS` beat intervals."""
        return (now - self.beat_at).total_seconds() < ALIVE_BEATS * max(self.beat_interval_s, 1.0)



#: The parts of a flush's time (:mod:`leadline.adapters.store.timing`); ``commit`` is the remainder.
STORE_TIME_PARTS = ("events", "journal", "snapshots", "status", "other", "commit")


@dataclass(frozen=True, slots=True)
class StoreTime:
    """Seconds the store's flushes spent per part over ``window_s`` seconds of wall time."""

    window_s: float
    flushes: int
    seconds: dict[str, float]

    @property
    def total_s(self) -> float:
        return sum(self.seconds.values())

    def fields(self) -> dict[str, float | int]:
        """For one log line: the window, the flushes, the busy share, then seconds and % of each part."""
        total = self.total_s
        busy = 100.0 * total / self.window_s if self.window_s > 0 else 0.0
        out: dict[str, float | int] = {"window_s": round(self.window_s, 1), "flushes": self.flushes,
                                       "busy_pct": round(busy, 1)}
        for part in STORE_TIME_PARTS:
            seconds = self.seconds.get(part, 0.0)
            out[f"{part}_s"] = round(seconds, 3)
            out[f"{part}_pct"] = round(100.0 * seconds / total, 1) if total > 0 else 0.0
        return out


@runtime_checkable
class Source(Protocol):
    """What the service loop needs of any input."""

    name: str

    def start(self) -> None:
        """Open files or connect; must not block on a broker that is down."""

    def poll(self, max_items: int, timeout_s: float) -> list[Reading]:
        """Readings available now (up to ``max_items``), waiting at most ``timeout_s``."""

    def durable_marks(self, readings: Sequence[Reading]) -> list[SourceOffset]:
        """Marks to commit in the same transaction as the effects of ``readings``."""

    def ack(self, readings: Sequence[Reading]) -> None:
        """Called after the commit of the effects of ``readings`` returned."""

    def take_rejects(self) -> list[RejectSample]:
        """Rejected records (counts and bounded samples) since the last call."""

    def stop(self) -> None:
        """Stop reading; pending readings may still be polled and acked."""


@runtime_checkable
class EventSink(Protocol):
    """What the service loop writes to the store, and how it commits.

    Staged items become durable together at :meth:`flush`, in one
    transaction, or not at all; a failed flush keeps them staged for the
    next one. Implemented by :class:`leadline.adapters.store.EventWriter`
    (and so by :class:`~leadline.adapters.store.EventStore`).
    """

    def stage_event(self, ev: AlarmEvent) -> None:
        """Stage an event; copies of one episode ``(feed_id, rule, start)`` merge."""

    def stage_offset(self, off: SourceOffset) -> None:
        """Stage a followed file's mark, to commit with the events of its rows."""

    def stage_reject(self, sample: RejectSample) -> None:
        """Count a rejected input record and keep it as a sample."""

    def stage_reject_sample(self, sample: RejectSample) -> None:
        """Keep a rejected input record as a sample (bounded), without counting it."""

    def stage_reject_count(self, source: str, reason: str, count: int, first_seen: datetime,
                           last_seen: datetime) -> None:
        """Add ``count`` rejects of one source and reason to the exact totals."""

    def stage_evidence(self, record: Any) -> None:
        """Stage the readings and forecasts around an episode, to commit with the events."""

    def stage_checkpoint(self, feed_id: str, state: bytes, model_version: int) -> None:
        """Stage a feed's stream state (the latest staged one per feed wins)."""

    def record_model(self, feed_id: str, order: str, parameters: dict[str, Any], thresholds: dict[str, Any],
                     fit_stats: dict[str, Any], fitted_at: datetime, window_start: datetime,
                     window_end: datetime, reason: str) -> int:
        """Record one fit at once; return its version (1, 2, ... per feed)."""

    def stage_feed_status(self, row: Any) -> None:
        """Stage a feed's status (state, last reading, source, unit, learning progress)."""

    def stage_heartbeat(self, beat: Any) -> None:
        """Stage the service's heartbeat (start time, this beat, pid, version)."""

    def shelving_in_force(self, now: datetime) -> dict[str, datetime]:
        """The feeds shelved at ``now`` and until when, from the committed shelving notes."""
    def stage_mark(self, name: str, value: int) -> None:
        """Stage a named service mark (the last accept note applied), to commit with the events."""

    def mark(self, name: str) -> int | None:
        """The committed value of a service mark, or None."""

    def accept_notes_after(self, note_id: int) -> list[Any]:
        """The committed ``accept`` notes with an id above ``note_id``, oldest first
        (:class:`~leadline.adapters.store.records.AcceptNote`)."""

    def flush_due(self, now_monotonic: float | None = None) -> bool:
        """True when what is staged should be committed now."""

    def flush(self) -> int:
        """Commit everything staged in one transaction; return the events written."""

    def take_store_time(self) -> StoreTime:
        """The flushes' time per part since the last call (:class:`StoreTime`), then reset."""

    def close(self) -> None:
        """Flush what is staged, then release the connections."""


@runtime_checkable
class AlarmPublisher(Protocol):
    """An output told of each event once the event is committed.

    Implemented by :class:`leadline.adapters.sinks.MqttAlarmPublisher`.
    """

    def publish(self, event: AlarmEvent) -> None:
        """Send ``event`` (an onset or a clearing); raise a ``LeadlineError`` when it cannot."""

    def close(self) -> None:
        """Stop sending and release the connection."""

