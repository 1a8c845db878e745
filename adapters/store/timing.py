"""Where the store's flushes spend their time: counters per part, read and reset by the service.

:class:`StoreTiming` adds up the wall time of each flush
(:meth:`~.eventstore.EventWriter.flush`) by part; the service takes the sums
with :meth:`~.eventstore.EventWriter.take_store_time` and logs them once per
summary interval and at shutdown (``store time window_s=... events_s=...``),
so an operator sees what the store's time goes to.

Parts (:data:`STORE_TIME_PARTS`)
--------------------------------
``events``
    alarm events upserted and their evidence records (the incidents' writes);
``journal``
    accepted readings journaled, their per-feed counts, and followed files'
    offsets;
``snapshots``
    feed snapshots (with the journal truncation each one allows) and
    checkpoints;
``status``
    feed rows, feed status rows and the heartbeat;
``other``
    reject counts and samples, service marks;
``commit``
    what is left of the flush: opening the write transaction, committing it
    (SQLite: the WAL append; PostgreSQL: the round trip and WAL flush).

The parts of a flush add up to its wall time, by construction (``commit``
is the remainder), so the shares of a :class:`~leadline.adapters.ports.StoreTime`
add up to 100 %.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager

from leadline.adapters.ports import STORE_TIME_PARTS, StoreTime

__all__ = ["STORE_TIME_PARTS", "StoreTiming"]


class StoreTiming:
    """Seconds per part of the flushes since the last :meth:`take` (module docstring).

    Parameters
    ----------
    clock : callable
        Monotonic seconds (default :func:`time.perf_counter`).
    """

    def __init__(self, clock: Callable[[], float] = time.perf_counter) -> None:
        self._clock = clock
        self._seconds = dict.fromkeys(STORE_TIME_PARTS, 0.0)
        self._flushes = 0
        self._since = clock()

    @contextmanager
    def part(self, name: str) -> Iterator[None]:
        """Add the time spent inside the block to part ``name``."""
        if name not in self._seconds or name == "commit":
            raise ValueError(f"unknown store time part {name!r}; expected one of {STORE_TIME_PARTS[:-1]}")
        start = self._clock()
        try:
            yield
        finally:
            self._seconds[name] += self._clock() - start

    @contextmanager
    def flush(self) -> Iterator[None]:
        """One flush: its time not taken by a part goes to ``commit``; failed flushes count too."""
        start = self._clock()
        before = sum(self._seconds.values())
        try:
            yield
        finally:
            inside = sum(self._seconds.values()) - before
            self._seconds["commit"] += max(0.0, self._clock() - start - inside)
            self._flushes += 1

    def take(self) -> StoreTime:
        """The sums since the last call (or since creation), then start again from zero."""
        now = self._clock()
        taken = StoreTime(window_s=now - self._since, flushes=self._flushes, seconds=dict(self._seconds))
        self._seconds = dict.fromkeys(STORE_TIME_PARTS, 0.0)
        self._flushes = 0
        self._since = now
        return taken


class NoTiming:
    """A stand-in for :class:`StoreTiming` that measures nothing (callers of :func:`~.writer.write_buffer`)."""

    @contextmanager
    def part(self, name: str) -> Iterator[None]:  # noqa: ARG002 - same signature as StoreTiming.part
        yield


NO_TIMING = NoTiming()
