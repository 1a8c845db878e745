"""Counting and sampling of rejected input records, shared by every source.

A source hands each :class:`~leadline.detector.errors.RejectError` to a
:class:`RejectLog`. The log counts it by reason code (for ever, see
:meth:`RejectLog.counts`) and keeps a bounded number of samples per reason
until the service takes them (:meth:`RejectLog.take`) for the rejects table.
The raw record kept in a sample is cut to ``max_raw_bytes``.
"""

from __future__ import annotations

import logging
import threading
from collections import Counter
from datetime import datetime, timezone

from leadline.adapters.ports import RejectSample
from leadline.detector.errors import RejectError

logger = logging.getLogger("leadline.sources.rejects")


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
    log_first : int
        The first ``log_first`` rejects of each reason are logged at WARNING,
        later ones only every ``log_every``-th.
    """

    def __init__(
        self,
        source: str,
        max_samples_per_reason: int = 20,
        max_raw_bytes: int = 512,
        log_first: int = 5,
        log_every: int = 1000,
    ):
        self.source = source
        self.max_samples_per_reason = max_samples_per_reason
        self.max_raw_bytes = max_raw_bytes
        self._log_first = log_first
        self._log_every = log_every
        self._lock = threading.Lock()
        self._counts: Counter[str] = Counter()
        self._samples: list[RejectSample] = []
        self._sampled: Counter[str] = Counter()

    def add(self, error: RejectError, raw: bytes | None = None) -> None:
        """Count ``error`` and keep it as a sample while under the bound."""
        raw_bytes = error.raw if raw is None else raw
        if raw_bytes is None:
            raw_bytes = b""
        elif not isinstance(raw_bytes, bytes):
            raw_bytes = bytes(raw_bytes)
        with self._lock:
            self._counts[error.reason] += 1
            n = self._counts[error.reason]
            if self._sampled[error.reason] < self.max_samples_per_reason:
                self._sampled[error.reason] += 1
                self._samples.append(
                    RejectSample(
                        source=self.source,
                        reason=error.reason,
                        where=error.where,
                        detail=error.detail,
                        raw=raw_bytes[: self.max_raw_bytes],
                        seen_at=datetime.now(timezone.utc),
                    )
                )
        if n <= self._log_first or n % self._log_every == 0:
            logger.warning("%s: rejected (%s #%d): %s", self.source, error.reason, n, error)

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
