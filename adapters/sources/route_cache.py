"""The topic -> (subscription, feed id) cache of the MQTT subscriber, bounded in bytes (LRU).

Routing a topic through the patterns of :mod:`.topics` costs a split and a
comparison per level; the subscriber caches the result per topic. Topics
come from the network, so the cache is bounded by the bytes it holds (the
UTF-8 length of topic and feed id plus a fixed allowance per entry for the
objects around them), and the least recently used entries go first.
"""

from __future__ import annotations

from collections import OrderedDict
from typing import Any

#: Bytes charged per entry besides the two strings (dict slot, tuple, str headers; from memory, rounded up).
ENTRY_OVERHEAD_BYTES = 200
DEFAULT_MAX_BYTES = 16 * 1024 * 1024


class RouteCache:
    """A least-recently-used map from topic to route, within ``max_bytes``."""

    def __init__(self, max_bytes: int = DEFAULT_MAX_BYTES) -> None:
        if max_bytes < ENTRY_OVERHEAD_BYTES:
            raise ValueError(f"max_bytes must be at least {ENTRY_OVERHEAD_BYTES}, got {max_bytes}")
        self.max_bytes = int(max_bytes)
        self.bytes = 0
        self._items: OrderedDict[str, tuple[Any, str, int]] = OrderedDict()

    def __len__(self) -> int:
        return len(self._items)

    def get(self, topic: str) -> tuple[Any, str] | None:
        item = self._items.get(topic)
        if item is None:
            return None
        self._items.move_to_end(topic)
        return item[0], item[1]

    def put(self, topic: str, subscription: Any, feed_id: str) -> None:
        size = len(topic.encode("utf-8", "surrogatepass")) + len(feed_id.encode("utf-8", "surrogatepass"))
        size += ENTRY_OVERHEAD_BYTES
        if size > self.max_bytes:
            return  # larger than the whole cache: not cached
        old = self._items.pop(topic, None)
        if old is not None:
            self.bytes -= old[2]
        while self._items and self.bytes + size > self.max_bytes:
            _, (_, _, freed) = self._items.popitem(last=False)
            self.bytes -= freed
        self._items[topic] = (subscription, feed_id, size)
        self.bytes += size


__all__ = ["DEFAULT_MAX_BYTES", "ENTRY_OVERHEAD_BYTES", "RouteCache"]
