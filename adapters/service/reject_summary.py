"""Rejects from the sources into the store (exact counts) and into the log (one line per minute).

:func:`stage_source_rejects` moves what a source rejected since the last call
into the store: the exact count per reason as a delta
(:meth:`~leadline.adapters.store.eventstore.EventStore.stage_reject_count`),
and the capped samples apart from it
(:meth:`~leadline.adapters.store.eventstore.EventStore.stage_reject_sample`).
A source without ``take_reject_counts`` (an older implementation of the
:class:`~leadline.adapters.sources.base.Source` protocol) has its samples
counted one by one, as before.

:class:`RejectSummary` logs at most one WARNING line per source and reason
per ``interval_s`` (a minute by default): the first reject of a quiet
reason is logged at once, later ones are added up and logged when the
interval has passed, so a flood of bad input costs one line a minute.
"""

from __future__ import annotations

import logging
import time
from typing import Any, Callable

logger = logging.getLogger("leadline.rejects")


class RejectSummary:
    """One log line per (source, reason) per interval.

    Parameters
    ----------
    interval_s : float
        At most one line per (source, reason) this often.
    clock : callable
        Monotonic seconds.
    """

    def __init__(self, interval_s: float = 60.0, clock: Callable[[], float] = time.monotonic) -> None:
        self.interval_s = float(interval_s)
        self._clock = clock
        # (source, reason) -> [rejects not yet logged, time of the last line, total]
        self._keys: dict[tuple[str, str], list] = {}

    def note(self, source: str, reason: str, count: int) -> None:
        """Count ``count`` new rejects; log at once when the key has been quiet for an interval."""
        if count <= 0:
            return
        now = self._clock()
        entry = self._keys.get((source, reason))
        if entry is None:
            entry = self._keys[(source, reason)] = [0, float("-inf"), 0]
        entry[0] += count
        entry[2] += count
        if now - entry[1] >= self.interval_s:
            self._emit(source, reason, entry, now)

    def tick(self) -> None:
        """Log the keys whose rejects are waiting and whose interval has passed."""
        now = self._clock()
        for (source, reason), entry in self._keys.items():
            if entry[0] and now - entry[1] >= self.interval_s:
                self._emit(source, reason, entry, now)

    def flush(self) -> None:
        """Log everything still waiting (at shutdown)."""
        now = self._clock()
        for (source, reason), entry in self._keys.items():
            if entry[0]:
                self._emit(source, reason, entry, now)

    def _emit(self, source: str, reason: str, entry: list, now: float) -> None:
        since = "" if entry[1] == float("-inf") else f" in the last {now - entry[1]:.0f} s"
        logger.warning("rejects source=%s reason=%s count=%d%s total=%d", source, reason, entry[0], since, entry[2])
        entry[0] = 0
        entry[1] = now


def stage_source_rejects(store: Any, source: Any, summary: RejectSummary | None = None) -> int:
    """Stage ``source``'s rejects since the last call in ``store``; return how many rejects."""
    samples = source.take_rejects()
    take_counts = getattr(source, "take_reject_counts", None)
    if take_counts is None:
        for sample in samples:
            store.stage_reject(sample)
            if summary is not None:
                summary.note(sample.source, sample.reason, 1)
        return len(samples)
    for sample in samples:
        store.stage_reject_sample(sample)
    total = 0
    for delta in take_counts():
        store.stage_reject_count(delta.source, delta.reason, delta.count, delta.first_seen, delta.last_seen)
        if summary is not None:
            summary.note(delta.source, delta.reason, delta.count)
        total += delta.count
    return total


__all__ = ["RejectSummary", "stage_source_rejects"]
