"""Evidence of each alarm episode: the readings and forecasts around it.

:class:`EvidenceRecorder` is fed every scored slot (the engine's
``EngineOutput.innovations``) and every event. It keeps, per feed, a ring
of the last ``before_slots`` slots, and for each episode captures

- the ``before_slots`` slots before the onset (from the ring),
- the episode itself, from the onset to the clearing: at most
  ``max_episode_slots`` slots, the first half and the latest half kept when
  an episode runs longer (the slots left out are counted),
- ``after_slots`` slots after the clearing.

A finished :class:`EvidenceRecord` is emitted once the after-window is
complete; :meth:`EvidenceRecorder.partial` gives a record of every episode
still being captured, on demand (for a checkpoint or a shutdown). It does no
I/O and holds a bounded amount of memory per feed: the ring, and at most
``max_captures_per_feed`` captures, each at most ``before_slots +
max_episode_slots`` slots (the after-window is part of the kept latest
half, which is at least ``after_slots`` long).

One slot is ``(epoch_s, value, forecast, lower, upper)``: the slot's UTC
time in seconds since the epoch, the reading (NaN when missing), the model's
one-step forecast f_t and its forecast interval.
"""

from __future__ import annotations

import math
from array import array
from collections import deque
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any, Iterable

import numpy as np

from .events import AlarmEvent

#: Slots kept before an onset, after a clearing, and at most within an episode.
BEFORE_SLOTS = 96
AFTER_SLOTS = 24
MAX_EPISODE_SLOTS = 2000
#: Captures open at once on one feed (episodes plus those waiting for their after-window).
MAX_CAPTURES_PER_FEED = 16
#: Extra ring slots beyond ``before_slots``: one engine output can carry several
#: slots (a gap filled at once) before the event that opens an episode.
RING_SLACK = 32

FIELDS = ("epoch_s", "value", "forecast", "lower", "upper")


@dataclass(frozen=True, eq=False)
class EvidenceRecord:
    """The readings and forecasts around one alarm episode.

    Attributes
    ----------
    feed_id, rule : str
    start : datetime
        UTC onset: with ``feed_id`` and ``rule`` the event's key.
    complete : bool
        True once the episode cleared and its after-window was captured;
        False for a record of an open episode (or one cut short).
    epoch_s : ndarray of float64
        Slot times, seconds since 1970-01-01T00:00Z, increasing.
    value, forecast, lower, upper : ndarray of float32
        The reading, the one-step forecast and its interval per slot (NaN
        where missing or not scored).
    end : datetime or None
        The clearing time, None while the episode is open.
    omitted_slots : int
        Episode slots left out because the episode was longer than the cap.
    """

    feed_id: str
    rule: str
    start: datetime
    complete: bool
    epoch_s: np.ndarray
    value: np.ndarray
    forecast: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    end: datetime | None = None
    omitted_slots: int = 0

    @property
    def key(self) -> tuple[str, str, datetime]:
        """``(feed_id, rule, start)``, as :attr:`AlarmEvent.key`."""
        return (self.feed_id, self.rule, self.start)

    def __len__(self) -> int:
        return int(self.epoch_s.size)


def _epoch(t: datetime) -> float:
    return t.timestamp()


def _emitted_s(event: AlarmEvent) -> float:
    """When the engine emitted an event: its clearing time, else its onset."""
    return _epoch(event.end if event.end is not None else event.start)


class _Ring:
    """A fixed-size ring of slots (rows of :data:`FIELDS`) in one flat float64 buffer.

    A plain ``array('d')`` with element stores: about 5x cheaper per slot than
    assigning a row of a numpy array, and 40 bytes a slot.
    """

    __slots__ = ("data", "capacity", "size", "head")

    def __init__(self, capacity: int) -> None:
        self.data = array("d", bytes(8 * len(FIELDS) * capacity))
        self.capacity = capacity
        self.size = 0
        self.head = 0  # next row to write

    def append(self, row: tuple[float, float, float, float, float]) -> None:
        i = self.head * 5
        d = self.data
        d[i], d[i + 1], d[i + 2], d[i + 3], d[i + 4] = row
        self.head = (self.head + 1) % self.capacity
        if self.size < self.capacity:
            self.size += 1

    def extend(self, rows: np.ndarray) -> None:
        """Many slots, oldest first (an (n, 5) array): as :meth:`append` row by row."""
        n = rows.shape[0]
        if n == 0:
            return
        if n > self.capacity:
            rows, n = rows[-self.capacity:], self.capacity
        flat = np.frombuffer(self.data, dtype=float).reshape(self.capacity, len(FIELDS))
        flat[(self.head + np.arange(n)) % self.capacity] = rows
        self.head = (self.head + n) % self.capacity
        self.size = min(self.size + n, self.capacity)

    def rows(self) -> np.ndarray:
        """The kept slots, oldest first (a copy)."""
        flat = np.frombuffer(self.data, dtype=float).reshape(self.capacity, len(FIELDS))
        if self.size < self.capacity:
            return flat[: self.size].copy()
        return np.concatenate([flat[self.head :], flat[: self.head]])


@dataclass
class _Capture:
    event: AlarmEvent
    before: np.ndarray  # (n, 5)
    head: list = field(default_factory=list)  # first slots of the episode
    tail: deque = field(default_factory=deque)  # latest slots (episode and after-window)
    omitted: int = 0
    end_s: float | None = None
    after: int = 0  # slots at or after the clearing

    def add(self, row: tuple, head_cap: int) -> None:
        if self.end_s is not None and row[0] >= self.end_s:
            self.after += 1
        if len(self.head) < head_cap and not self.tail:
            self.head.append(row)
            return
        if len(self.tail) == self.tail.maxlen:
            self.omitted += 1
        self.tail.append(row)

    def record(self, complete: bool) -> EvidenceRecord:
        parts = [self.before]
        if self.head:
            parts.append(np.asarray(self.head, dtype=float))
        if self.tail:
            parts.append(np.asarray(self.tail, dtype=float))
        rows = np.concatenate(parts) if len(parts) > 1 else parts[0]
        ev = self.event
        return EvidenceRecord(
            feed_id=ev.feed_id,
            rule=ev.rule,
            start=ev.start,
            complete=complete,
            epoch_s=rows[:, 0].copy(),
            value=rows[:, 1].astype(np.float32),
            forecast=rows[:, 2].astype(np.float32),
            lower=rows[:, 3].astype(np.float32),
            upper=rows[:, 4].astype(np.float32),
            end=ev.end,
            omitted_slots=self.omitted,
        )


class EvidenceRecorder:
    """Captures the slots around every alarm episode (see the module docstring).

    Parameters
    ----------
    before_slots : int
        Slots kept before each onset (default 96: a day of 15-minute readings).
    after_slots : int
        Slots captured after each clearing (default 24).
    max_episode_slots : int
        Cap on the slots kept within one episode, after-window included
        (default 2,000); must exceed ``2 * after_slots``.
    max_captures_per_feed : int
        Captures open at once on one feed; beyond it the oldest is emitted
        as an incomplete record.

    Notes
    -----
    Feed each engine output with :meth:`observe`. Its events are taken in
    time order among its slots, each after the slots up to its time: so the
    onset slot falls in the episode, and the before-window holds the slots
    strictly before the onset time, even when one output replays many slots.
    """

    def __init__(self, before_slots: int = BEFORE_SLOTS, after_slots: int = AFTER_SLOTS,
                 max_episode_slots: int = MAX_EPISODE_SLOTS,
                 max_captures_per_feed: int = MAX_CAPTURES_PER_FEED) -> None:
        if before_slots < 0 or after_slots < 0:
            raise ValueError(f"before_slots and after_slots must be >= 0, got {before_slots}, {after_slots}")
        if max_episode_slots <= 2 * after_slots:
            raise ValueError(f"max_episode_slots ({max_episode_slots}) must exceed 2 * after_slots "
                             f"({2 * after_slots})")
        if max_captures_per_feed < 1:
            raise ValueError(f"max_captures_per_feed must be >= 1, got {max_captures_per_feed}")
        self.before_slots = int(before_slots)
        self.after_slots = int(after_slots)
        self.max_episode_slots = int(max_episode_slots)
        self.max_captures_per_feed = int(max_captures_per_feed)
        self._head_cap = self.max_episode_slots // 2
        self._tail_cap = self.max_episode_slots - self._head_cap
        self._rings: dict[str, _Ring] = {}
        self._captures: dict[str, dict[tuple, _Capture]] = {}

    # ------------------------------------------------------------------ feeding
    def observe(self, output: Any, reading: Any = None) -> list[EvidenceRecord]:
        """Take one engine output; return the records finished by it.

        Parameters
        ----------
        output : EngineOutput
            Its ``innovations`` ((feed_id, Innovation) pairs) and ``events``.
        reading : Reading, optional
            The reading that produced the output. Where a slot's innovation
            carries no time (an out-of-range reading goes to the model as a
            missing slot), the slot takes the reading's time and value.
        """
        finished: list[EvidenceRecord] = []
        # An output can carry many slots (the readings buffered while a feed was
        # being fitted are replayed at once) with the events among them: take the
        # events in time order between the slots, each once the slots up to its
        # time are in.
        pending: dict[str, deque] = {}
        for event in sorted(output.events, key=_emitted_s):
            pending.setdefault(event.feed_id, deque()).append(event)
        for feed_id, inn in output.innovations:
            ts, value = inn.timestamp, inn.value
            if ts is None:
                if reading is None or reading.feed_id != feed_id:
                    continue
                ts = reading.timestamp
                if math.isnan(value):
                    value = float(reading.value)
            t = _epoch(ts)
            waiting = pending.get(feed_id)
            while waiting and _emitted_s(waiting[0]) < t:
                finished.extend(self.event(waiting.popleft()))
            finished.extend(self.slot(feed_id, t, value, inn.forecast, inn.lower, inn.upper))
        for waiting in pending.values():
            for event in waiting:
                finished.extend(self.event(event))
        return finished

    def slot(self, feed_id: str, epoch_s: float, value: float, forecast: float, lower: float,
             upper: float) -> list[EvidenceRecord]:
        """One scored slot of one feed; returns the records it finished."""
        row = (epoch_s, value, forecast, lower, upper)
        ring = self._rings.get(feed_id)
        if ring is None:
            ring = self._rings[feed_id] = _Ring(self.before_slots + RING_SLACK)
        ring.append(row)  # array('d') takes numbers only: a TypeError here names a bad slot
        captures = self._captures.get(feed_id)
        if not captures:
            return []
        done: list[EvidenceRecord] = []
        for key in list(captures):
            cap = captures[key]
            cap.add(row, self._head_cap)
            if cap.end_s is not None and cap.after >= self.after_slots:
                done.append(captures.pop(key).record(complete=True))
        return done

    def slots(self, feed_id: str, rows: np.ndarray) -> list[EvidenceRecord]:
        """Many scored slots of one feed with no event among them (an (n, 5) array of
        :data:`FIELDS`, oldest first): as :meth:`slot` row by row."""
        if self._captures.get(feed_id):
            done: list[EvidenceRecord] = []
            for row in np.asarray(rows, dtype=float).tolist():
                done.extend(self.slot(feed_id, *row))
            return done
        ring = self._rings.get(feed_id)
        if ring is None:
            ring = self._rings[feed_id] = _Ring(self.before_slots + RING_SLACK)
        ring.extend(np.asarray(rows, dtype=float))
        return []

    def event(self, event: AlarmEvent) -> list[EvidenceRecord]:
        """An onset or clearing; returns a record finished by it (a clearing
        with ``after_slots = 0``) or pushed out by the per-feed cap."""
        captures = self._captures.setdefault(event.feed_id, {})
        out: list[EvidenceRecord] = []
        cap = captures.get(event.key)
        if cap is None:
            if len(captures) >= self.max_captures_per_feed:
                oldest = min(captures, key=lambda k: captures[k].event.start)
                out.append(captures.pop(oldest).record(complete=False))
            cap = captures[event.key] = self._open(event)
        if event.end is not None and cap.end_s is None:
            cap.event = event
            cap.end_s = _epoch(event.end)
            cap.after = sum(1 for row in (*cap.head, *cap.tail) if row[0] >= cap.end_s)
            if cap.after >= self.after_slots:
                out.append(captures.pop(event.key).record(complete=True))
        return out

    def _open(self, event: AlarmEvent) -> _Capture:
        ring = self._rings.get(event.feed_id)
        rows = ring.rows() if ring is not None else np.empty((0, len(FIELDS)))
        start_s = _epoch(event.start)
        before_mask = rows[:, 0] < start_s
        cap = _Capture(event=event, before=rows[before_mask][-self.before_slots:] if self.before_slots else
                       rows[:0], tail=deque(maxlen=self._tail_cap))
        for row in rows[~before_mask]:
            cap.add(tuple(row), self._head_cap)
        return cap

    # ------------------------------------------------------------------ reading
    def partial(self) -> list[EvidenceRecord]:
        """A record (``complete=False``) of every episode still being captured."""
        return [cap.record(complete=False) for caps in self._captures.values() for cap in caps.values()]

    def open_keys(self) -> list[tuple[str, str, datetime]]:
        return [key for caps in self._captures.values() for key in caps]

    def held_slots(self, feed_id: str) -> int:
        """Slots held for one feed (ring and captures): the memory bound's measure."""
        ring = self._rings.get(feed_id)
        n = 0 if ring is None else ring.capacity
        for cap in self._captures.get(feed_id, {}).values():
            n += cap.before.shape[0] + len(cap.head) + len(cap.tail)
        return n

    def max_held_slots(self) -> int:
        """The bound on :meth:`held_slots` for any feed."""
        per_capture = self.before_slots + self._head_cap + self._tail_cap
        return self.before_slots + RING_SLACK + self.max_captures_per_feed * per_capture


def record_from_arrays(feed_id: str, rule: str, start: datetime, complete: bool, epoch_s: Iterable[float],
                       value: Iterable[float], forecast: Iterable[float], lower: Iterable[float],
                       upper: Iterable[float], end: datetime | None = None,
                       omitted_slots: int = 0) -> EvidenceRecord:
    """An :class:`EvidenceRecord` from plain sequences (the store's reader uses it)."""
    if start.tzinfo is None or (end is not None and end.tzinfo is None):
        raise ValueError("evidence start and end must be timezone-aware (UTC)")
    arrays = [np.asarray(epoch_s, dtype=float)] + [np.asarray(a, dtype=np.float32)
                                                   for a in (value, forecast, lower, upper)]
    if len({a.shape for a in arrays}) != 1 or arrays[0].ndim != 1:
        raise ValueError(f"evidence arrays must be 1-D and of one length, got {[a.shape for a in arrays]}")
    return EvidenceRecord(feed_id, rule, start.astimezone(timezone.utc), bool(complete), *arrays,
                          end=None if end is None else end.astimezone(timezone.utc),
                          omitted_slots=int(omitted_slots))
