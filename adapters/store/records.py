"""What the store's queries return: small frozen records.

Every ``datetime`` in them is timezone-aware UTC, on both backends.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

from leadline.detector.events import AlarmEvent


@dataclass(frozen=True, slots=True)
class Note:
    """One entry of the audit trail: never edited once written.

    Attributes
    ----------
    id : int
    event_id : int or None
        The event it belongs to; None for a shelving note (which is of a feed).
    feed_id : str
    kind : str
        ``"ack"``, ``"comment"``, ``"shelve"`` or ``"accept"`` (a level
        shift accepted as the feed's new normal).
    operator : str
        Who wrote it.
    text : str
    at : datetime
        When it was written (UTC).
    expires_at : datetime or None
        Shelving notes only: when the shelving ends.
    """

    id: int
    event_id: int | None
    feed_id: str
    kind: str
    operator: str
    text: str
    at: datetime
    expires_at: datetime | None = None


@dataclass(frozen=True, slots=True)
class StoredEvent:
    """An event as stored, with its id and its notes (oldest first).

    Attributes
    ----------
    id : int
        The surrogate id an operator types (``leadline ack ID``).
    event : AlarmEvent
    created_at, updated_at : datetime
        When the row was first written and last upserted.
    notes : tuple of Note
    """

    id: int
    event: AlarmEvent
    created_at: datetime
    updated_at: datetime
    notes: tuple[Note, ...] = ()

    @property
    def acknowledged(self) -> bool:
        """True once any acknowledgement note exists."""
        return any(n.kind == "ack" for n in self.notes)

    @property
    def incident_start(self) -> datetime:
        """The start of the event's incident (its own start for an event stored without one)."""
        return self.event.incident_start or self.event.start


@dataclass(frozen=True, slots=True)
class AcceptNote:
    """An ``accept`` note with the key of its event: what the service applies to the engine."""

    note_id: int
    event_id: int
    feed_id: str
    rule: str
    event_start: datetime
    operator: str
    text: str
    at: datetime


@dataclass(frozen=True, slots=True)
class Incident:
    """The events of one feed's incident, as one listing line.

    Attributes
    ----------
    id : int
        The id of its first event (the one an operator types).
    feed_id : str
    start : datetime
        The incident's start (its first event's start).
    end : datetime or None
        The latest end of its events; None while any is active.
    rules : tuple of str
        The rules that fired, in the order they first fired.
    severity : str
        The worst severity.
    peak_abs_z : float
        The largest peak |z| (NaN when no event has one).
    events : tuple of StoredEvent
        Oldest first.
    """

    id: int
    feed_id: str
    start: datetime
    end: datetime | None
    rules: tuple[str, ...]
    severity: str
    peak_abs_z: float
    events: tuple[StoredEvent, ...]

    @property
    def acknowledged(self) -> bool:
        """True once every event of the incident is acknowledged."""
        return all(e.acknowledged for e in self.events)

    @property
    def acknowledged_events(self) -> int:
        return sum(1 for e in self.events if e.acknowledged)


@dataclass(frozen=True, slots=True)
class Feed:
    feed_id: str
    unit: str | None
    interval_s: float | None
    source: str | None
    created_at: datetime


@dataclass(frozen=True, slots=True)
class ModelRecord:
    """One fit of a feed's model (versions count 1, 2, ... per feed)."""

    feed_id: str
    version: int
    order: str
    parameters: dict[str, Any]
    thresholds: dict[str, Any]
    fit_stats: dict[str, Any]
    fitted_at: datetime
    window_start: datetime
    window_end: datetime
    reason: str
    recorded_at: datetime


@dataclass(frozen=True, slots=True)
class RejectCount:
    source: str
    reason: str
    count: int
    first_seen: datetime
    last_seen: datetime


@dataclass(frozen=True, slots=True)
class HourCount:
    """Events that started within one UTC hour ``[hour, hour + 1 h)``."""

    hour: datetime
    count: int


@dataclass(frozen=True, slots=True)
class FeedCount:
    feed_id: str
    count: int
