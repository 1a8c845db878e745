"""The subscriber's bounded queue and its bookkeeping of unacknowledged messages and recent readings.

Used by :class:`~leadline.adapters.sources.mqtt_subscriber.MqttSubscriber`:
the network thread only parses and enqueues (the queue blocks it, never
drops), and the service thread takes batches.
"""

from __future__ import annotations

import threading
import time
from collections import deque
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any


@dataclass
class _Pending:
    mid: int
    qos: int
    session: int
    keys: list[tuple[str, datetime]]
    extra: list[tuple[int, int, int]] = field(default_factory=list)  # (mid, qos, session) of dropped repeats


class _FeedWindow:
    __slots__ = ("order", "seen")

    def __init__(self) -> None:
        self.order: deque[datetime] = deque()
        self.seen: set[datetime] = set()

    def add(self, timestamp: datetime, limit: int) -> None:
        if timestamp in self.seen:
            return
        self.order.append(timestamp)
        self.seen.add(timestamp)
        if len(self.order) > limit:
            self.seen.discard(self.order.popleft())


class _BoundedQueue:
    """A bounded hand-over from the network thread to the service thread.

    ``put`` blocks while ``maxsize`` items wait (backpressure). Cheaper than
    :class:`queue.Queue` per item: with one producer (paho's network thread)
    and one taker, two events suffice (data waiting, room free), and the
    taker takes many items per call.
    """

    def __init__(self, maxsize: int):
        self._items: deque[tuple[Any, ...]] = deque()
        self._maxsize = maxsize
        self._ready = threading.Event()  # set: items may be waiting
        self._space = threading.Event()  # set: a slot may be free
        self._space.set()

    def put(self, item: tuple[Any, ...], timeout_s: float) -> bool:
        """Append ``item``; False when still full after ``timeout_s`` (one producer only)."""
        items = self._items
        if len(items) >= self._maxsize:
            self._space.clear()
            if len(items) >= self._maxsize:  # checked again after clear(): no lost wake-up
                self._space.wait(timeout_s)
                if len(items) >= self._maxsize:
                    return False
        items.append(item)
        if not self._ready.is_set():
            self._ready.set()
        return True

    def take(self, max_readings: int, timeout_s: float, linger_s: float = 0.0) -> list[tuple[Any, ...]]:
        """Items holding up to about ``max_readings`` readings, waiting at most ``timeout_s``.

        Once something is there, wait ``linger_s`` more for a fuller batch
        (fewer thread switches and ack rounds per message).
        """
        items = self._items
        if not items:
            self._ready.clear()
            if not items and timeout_s > 0:
                self._ready.wait(timeout_s)
        if items and linger_s > 0 and len(items) < max_readings and len(items) < self._maxsize:
            time.sleep(linger_s)
        taken: list[tuple[Any, ...]] = []
        readings = 0
        while items and readings < max_readings:
            item = items.popleft()
            taken.append(item)
            readings += len(item[-1])
        if taken and not self._space.is_set():
            self._space.set()
        return taken

    def __len__(self) -> int:
        return len(self._items)
