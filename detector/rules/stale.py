"""Stale feed rule: no reading for m nominal intervals; one event per outage.

Silence is judged in reading time against the clock. The engine calls
:meth:`StaleRule.assess` with the current time (wall-clock time live, the
data time in a replay); a reading calls :meth:`StaleRule.seen`. Only a
reading with a value counts: a slot reported empty (NaN) does not keep a
feed fresh.

* **Live.** The clock passes ``last_seen + m * interval_s`` and no reading
  arrived since the previous clock tick: the outage opens. It closes when
  readings resume, at the time of the first one, and its detail gives the
  outage's length in words ("3 d 0 h 17 min").
* **A backlog.** While late readings (older than the limit at the
  previous tick) keep arriving between ticks, the feed is catching up,
  not silent: nothing new opens, however old the readings.
  A backlog that fills the gap raises nothing for the part it fills.
* **A gap in the readings themselves** (a replay, or a backlog with a hole
  in it): a reading more than ``m * interval_s`` after the previous one is
  one outage, opened at ``previous + m * interval_s`` and closed at the
  reading (:meth:`StaleRule.seen` returns it).

The episode's start is *not* the time of the tick that noticed the silence
but the deterministic instant ``last_seen + m * interval_s``, so that a
replay, or a tick arriving late, gives the same event key.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta
from typing import Any

from ..durations import human_duration
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
        # a late reading arrived since the previous clock tick: the feed is catching up, not silent
        self.catching_up = False
        self.last_tick: datetime | None = None

    @property
    def timeout(self) -> timedelta:
        return timedelta(seconds=self.interval_s * self.missing_intervals)

    def parameters(self) -> dict[str, Any]:
        return {"interval_s": self.interval_s, "missing_intervals": self.missing_intervals}

    def status(self) -> dict[str, Any]:
        due = self.due()
        return {"due": due.isoformat() if due else None}

    def state_dict(self) -> dict[str, Any]:
        """The last reading with a value and the last clock tick (ISO 8601), as plain JSON values."""
        return {"v": self.STATE_VERSION, "last_seen": time_to_json(self.last_seen),
                "last_tick": time_to_json(self.last_tick), "catching_up": self.catching_up}

    def load_state(self, state: Any) -> None:
        state = self._check_state(state)
        self.last_seen = time_from_json(state["last_seen"])
        # states saved before the clock was kept lack these two: start as after a restart
        self.last_tick = time_from_json(state.get("last_tick"))
        self.catching_up = bool(state.get("catching_up", False))

    def seen(self, timestamp: datetime) -> tuple[Assessment, datetime] | None:
        """Note a reading with a value at ``timestamp`` (an older one is ignored).

        Returns
        -------
        (Assessment, start) or None
            When the reading ends a gap longer than the limit in reading time:
            the outage's raise assessment and its start (the caller opens and
            closes it at ``timestamp``). None otherwise.
        """
        if self.last_tick is not None and self.last_tick - timestamp > self.timeout:
            self.catching_up = True
        previous = self.last_seen
        if previous is not None and timestamp <= previous:
            return None
        self.last_seen = timestamp
        if previous is None or timestamp - previous <= self.timeout:
            return None
        return Assessment("alarm", False, math.nan, self.outage_detail(previous, timestamp)), previous + self.timeout

    def outage_detail(self, last: datetime, resumed: datetime | None) -> str:
        """The words for an outage from the reading at ``last`` to the one at ``resumed`` (None: still silent)."""
        if resumed is None:
            return (f"no reading since {last.isoformat()} (limit {self.missing_intervals:g} intervals of "
                    f"{human_duration(self.interval_s)})")
        return (f"no reading for {human_duration((resumed - last).total_seconds())}, from {last.isoformat()} "
                f"to {resumed.isoformat()} (limit {self.missing_intervals:g} intervals of "
                f"{human_duration(self.interval_s)})")

    def due(self) -> datetime | None:
        """The instant the feed goes stale if nothing arrives, or None before any reading."""
        return None if self.last_seen is None else self.last_seen + self.timeout

    def assess(self, now: datetime) -> tuple[Assessment, datetime] | None:
        """At clock time ``now``: (raise assessment, episode start) when stale, else None.

        None while late readings keep arriving between ticks (a backlog
        catching up): a reading is late when it is older than the limit at
        the previous tick.
        """
        catching_up, self.catching_up = self.catching_up, False
        self.last_tick = now if self.last_tick is None else max(self.last_tick, now)
        due = self.due()
        if due is None or now < due or catching_up:
            return None
        return Assessment("alarm", False, math.nan, self.outage_detail(self.last_seen, None)), due


def build(section: Any, ctx: BuildContext) -> StaleRule | None:
    config = ctx.config
    if config.interval_s is None:
        return None
    return StaleRule(config.interval_s, config.stale_intervals, ctx.last_seen)


ENTRY = RuleEntry(name="stale", kind="clock", build=build, lifecycle=LifecycleConfig(1, 1, 1))
