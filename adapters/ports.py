"""The seam between the world and the engine: what every source provides.

A source turns raw input (rows of a followed CSV file, MQTT messages) into
:class:`~leadline.detector.readings.Reading` objects. The service loop

1. polls readings from each source,
2. feeds them to the engine, which returns events,
3. commits the events *together with* the source's durable marks
   (:meth:`Source.durable_marks`, CSV byte offsets) in one store transaction,
4. and only then calls :meth:`Source.ack` (MQTT: PUBACK of the messages).

So an offset or an acknowledgement never runs ahead of the committed events:
after a crash the source resumes from the last committed mark, and the
store's unique key on (feed, rule, start) absorbs any replayed reading.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Protocol, Sequence, runtime_checkable

from leadline.detector.readings import Reading


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

