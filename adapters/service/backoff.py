"""Retrying a failed store flush with exponential backoff, logging state changes only.

After the n-th failure in a row the next try waits ``min(cap_s, base_s * 2**(n-1))``
seconds (common practice for retrying a shared resource: doubling delays
bounded by a cap). The owner logs one line when the resource goes down and
one when it is back, with the outage's length, never one per try:
:meth:`Backoff.failed` says whether a failure began an outage,
:meth:`Backoff.succeeded` returns the outage's length once it ends.
"""

from __future__ import annotations

import math
import time
from typing import Callable


class Backoff:
    """Exponential backoff between retries of one operation.

    Parameters
    ----------
    base_s : float
        Wait after the first failure.
    cap_s : float
        Longest wait.
    clock : callable
        Monotonic seconds.
    """

    def __init__(self, base_s: float = 1.0, cap_s: float = 60.0, clock: Callable[[], float] = time.monotonic):
        if not (math.isfinite(base_s) and base_s > 0):
            raise ValueError(f"base_s must be a positive number of seconds, got {base_s!r}")
        if not (math.isfinite(cap_s) and cap_s >= base_s):
            raise ValueError(f"cap_s must be at least base_s ({base_s}), got {cap_s!r}")
        self.base_s = float(base_s)
        self.cap_s = float(cap_s)
        self._clock = clock
        self.failures = 0
        self.down_since: float | None = None
        self.next_try = float("-inf")

    @property
    def down(self) -> bool:
        return self.failures > 0

    def ready(self) -> bool:
        """True when a try is due (always while nothing has failed)."""
        return self._clock() >= self.next_try

    def delay_s(self) -> float:
        """The wait after the current run of failures (0 when none)."""
        if self.failures == 0:
            return 0.0
        return min(self.cap_s, self.base_s * 2.0 ** min(self.failures - 1, 60))

    def failed(self) -> bool:
        """Record a failure and schedule the next try; True when this failure began an outage."""
        now = self._clock()
        first = self.failures == 0
        if first:
            self.down_since = now
        self.failures += 1
        self.next_try = now + self.delay_s()
        return first

    def succeeded(self) -> float | None:
        """Record a success; the outage's length in seconds when one just ended, else None."""
        was_down = self.down_since
        self.failures = 0
        self.down_since = None
        self.next_try = float("-inf")
        return None if was_down is None else self._clock() - was_down


__all__ = ["Backoff"]
