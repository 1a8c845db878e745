"""Counting and sampling of rejected input records, shared by every source.

A source hands each :class:`~leadline.detector.errors.RejectError` to a
:class:`RejectLog`. The log counts it by reason code (for ever, see
:meth:`RejectLog.counts`), counts it again as a *delta* until the service
takes the deltas (:meth:`RejectLog.take_counts`, exact: every reject is in
exactly one delta), and keeps a bounded number of samples per reason until
the service takes them (:meth:`RejectLog.take`) for the rejects table. The
store adds the deltas to its counts, separately from the capped samples, so
the stored counts are exact however many rejects a poll brings.
The raw record kept in a sample is cut to ``max_raw_bytes``.

Logging: each reject is logged at DEBUG only, with its location cut to
``max_where_chars``; the service logs one summary line per source and
reason per minute (:mod:`leadline.adapters.service.reject_summary`).
"""

from __future__ import annotations

import logging
import threading
from collections import Counter
from dataclasses import dataclass
from datetime import datetime, timezone

from leadline.adapters.ports import RejectSample
from leadline.detector.errors import RejectError

logger = logging.getLogger("leadline.sources.rejects")


@dataclass(frozen=True, slots=True)
class RejectDelta:
    """Rejects of one reason since the last :meth:`RejectLog.take_counts`."""

    source: str
    reason: str
    count: int
    first_seen: datetime
    last_seen: datetime


class RejectLog:
    """Counts by reason plus bounded samples; safe to use from two threads.

    Parameters
    ----------
    source : str
        Name of the configured source, copied into every sample.
    max_samples_per_reason : int
        Samples kept per reason between two calls of :meth:`take`.
    max_raw_bytes : int
        Raw bytes kept per sample.
    max_where_chars : int
        Characters of a reject's location (a topic, ``file:line``) kept in a
        sample and in the DEBUG line.
    """

    def __init__(
        self,
        source: str,
        max_samples_per_reason: int = 20,
        max_raw_bytes: int = 512,
        max_where_chars: int = 256,
    ):
        self.source = source
        self.max_samples_per_reason = max_samples_per_reason
        self.max_raw_bytes = max_raw_bytes
        self.max_where_chars = max_where_chars
        self._lock = threading.Lock()
        self._counts: Counter[str] = Counter()
        self._deltas: dict[str, list] = {}  # reason -> [count, first_seen, last_seen]
        self._samples: list[RejectSample] = []
        self._sampled: Counter[str] = Counter()

    def add(self, error: RejectError, raw: bytes | None = None) -> None:
        """Count ``error`` and keep it as a sample while under the bound."""
        raw_bytes = error.raw if raw is None else raw
        if raw_bytes is None:
            raw_bytes = b""
        elif not isinstance(raw_bytes, bytes):
            raw_bytes = bytes(raw_bytes)
        reason = error.reason
        where = error.where if len(error.where) <= self.max_where_chars else error.where[: self.max_where_chars] + "..."
        with self._lock:
            now = datetime.now(timezone.utc)  # read under the lock, so first_seen <= last_seen across threads
            self._counts[reason] += 1
            delta = self._deltas.get(reason)
            if delta is None:
                self._deltas[reason] = [1, now, now]
            else:
                delta[0] += 1
                delta[2] = max(delta[2], now)
            if self._sampled[reason] < self.max_samples_per_reason:
                self._sampled[reason] += 1
                self._samples.append(
                    RejectSample(
                        source=self.source,
                        reason=reason,
                        where=where,
                        detail=error.detail,
                        raw=raw_bytes[: self.max_raw_bytes],
                        seen_at=now,
                    )
                )
        if logger.isEnabledFor(logging.DEBUG):
            logger.debug("%s: rejected (%s) at %s: %s", self.source, reason, where, error.detail[:200])

    def counts(self) -> dict[str, int]:
        """Rejects by reason since the source was created."""
        with self._lock:
            return dict(self._counts)

    def total(self) -> int:
        with self._lock:
            return sum(self._counts.values())

    def take(self) -> list[RejectSample]:
        """Samples kept since the last call (at most ``max_samples_per_reason`` each)."""
        with self._lock:
            samples, self._samples = self._samples, []
            self._sampled.clear()
        return samples

    def take_counts(self) -> list[RejectDelta]:
        """Rejects per reason since the last call: every reject is in exactly one delta."""
        with self._lock:
            deltas, self._deltas = self._deltas, {}
        return [RejectDelta(self.source, reason, n, first, last) for reason, (n, first, last) in deltas.items()]
