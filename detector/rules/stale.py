"""Stale feed rule: no reading for m nominal intervals, raised by the clock.

The engine calls :meth:`StaleRule.tick` with the current time (wall-clock
time live, the data time in a replay); a reading calls :meth:`StaleRule.seen`.
Only a reading with a value counts: a slot reported empty (NaN) does not
keep a feed fresh.

The episode's start is *not* the time of the tick that noticed the silence
but the deterministic instant ``last_seen + m * interval_s``, so that a
replay, or a tick arriving late, gives the same event key.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta
from typing import Any

from ..errors import RuleError
from .contract import BuildContext, RuleBase, RuleEntry, time_from_json, time_to_json
from .lifecycle import Assessment, LifecycleConfig

#: Default silence, in nominal intervals, before ``stale`` is raised.
DEFAULT_STALE_INTERVALS = 5.0


class StaleRule(RuleBase):
    """Silence longer than ``missing_intervals`` nominal intervals.

    Parameters
    ----------
    interval_s : float
        The feed's nominal reading interval in seconds (> 0).
    missing_intervals : float
        m: raise once no reading arrived for m * interval_s (> 0).
    last_seen : datetime, optional
        The time of the last reading known (for example the end of the
        training window); the clock starts there.
    """

    name = "stale"

    def __init__(self, interval_s: float, missing_intervals: float = DEFAULT_STALE_INTERVALS,
                 last_seen: datetime | None = None) -> None:
        if not (math.isfinite(interval_s) and interval_s > 0):
            raise RuleError(f"stale interval_s must be a finite number > 0, got {interval_s!r}")
        if not (math.isfinite(missing_intervals) and missing_intervals > 0):
            raise RuleError(f"stale missing_intervals must be a finite number > 0, got {missing_intervals!r}")
        if last_seen is not None and last_seen.tzinfo is None:
            raise RuleError("stale last_seen must be timezone-aware (UTC)")
        self.interval_s = float(interval_s)
        self.missing_intervals = float(missing_intervals)
        self.last_seen = last_seen

    @property
    def timeout(self) -> timedelta:
        return timedelta(seconds=self.interval_s * self.missing_intervals)

    def parameters(self) -> dict[str, Any]:
        return {"interval_s": self.interval_s, "missing_intervals": self.missing_intervals}

    def status(self) -> dict[str, Any]:
        due = self.due()
        return {"due": due.isoformat() if due else None}

    def state_dict(self) -> dict[str, Any]:
        """The time of the last reading with a value (ISO 8601), as plain JSON values."""
        return {"v": self.STATE_VERSION, "last_seen": time_to_json(self.last_seen)}

    def load_state(self, state: Any) -> None:
        self.last_seen = time_from_json(self._check_state(state)["last_seen"])

    def seen(self, timestamp: datetime) -> None:
        """Note a reading with a value at ``timestamp`` (an older one is ignored)."""
        if self.last_seen is None or timestamp > self.last_seen:
            self.last_seen = timestamp

    def due(self) -> datetime | None:
        """The instant the feed goes stale if nothing arrives, or None before any reading."""
        return None if self.last_seen is None else self.last_seen + self.timeout

    def assess(self, now: datetime) -> tuple[Assessment, datetime] | None:
        """At clock time ``now``: (raise assessment, episode start) when stale, else None."""
        due = self.due()
        if due is None or now < due:
            return None
        silent_s = (now - self.last_seen).total_seconds()
        detail = (f"no reading for {silent_s:.0f} s ({silent_s / self.interval_s:.1f} nominal intervals of "
                  f"{self.interval_s:g} s; limit {self.missing_intervals:g}); last reading at "
                  f"{self.last_seen.isoformat()}")
        return Assessment("alarm", False, math.nan, detail), due


def build(section: Any, ctx: BuildContext) -> StaleRule | None:
    config = ctx.config
    if config.interval_s is None:
        return None
    return StaleRule(config.interval_s, config.stale_intervals, ctx.last_seen)


ENTRY = RuleEntry(name="stale", kind="clock", build=build, lifecycle=LifecycleConfig(1, 1, 1))
