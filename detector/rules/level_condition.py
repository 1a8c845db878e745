"""The condition behind a level shift or a drift: how far the feed sits from where it was before.

The CUSUM finds a shift, and the monitor re-anchors the stream so that the
model keeps forecasting on the new level. The operator needs something
else: an alarm that lasts as long as the feed stays away from the level it
had *before* the episode, and clears when the feed comes back. A
:class:`LevelCondition` keeps that comparison on the readings themselves,
independent of the model's re-anchoring and of the model family (a
differenced model follows a step into its state, so its innovations say
nothing about whether the step is still there).

Notes
-----
With y the finite readings (a reading the range rule rejected is not
kept), when an episode opens with a CUSUM run that began N steps ago:

.. math::

    L_0 = \\operatorname{median}(y_{s-n}, \\dots, y_{s-1}), \\qquad s = t - N

the level before the episode, from the ``before`` readings that precede the
run, and at each later step

.. math::

    L_t = \\operatorname{median}(y_{t-m+1}, \\dots, y_t), \\qquad D_t = L_t - L_0

the current level and its departure. The medians make one wild reading
irrelevant. The condition is *established* once

.. math::

    |D_t| > \\max\\big(c\\, \\hat\\sigma_0 \\sqrt{1/m + 1/n},\\; q\\big)

(the noise floor: \\hat\\sigma_0 the spread of the readings before the run,
1.4826 times their median absolute deviation, or their standard deviation
where that is larger; c = ``floor_sigmas``; q the reading resolution), and
it *holds* while D_t keeps the sign of the largest departure D* of the
episode and

.. math::

    |D_t| > r\\,|D^*| \\quad\\text{or}\\quad |D_t| > \\max\\big(c\\, \\hat\\sigma_0 \\sqrt{1/m + 1/n},\\; q\\big)

with r = ``return_fraction``: the feed has not come back more than (1 - r)
of the way, or it still sits beyond the noise floor. (The largest departure
D* of an autocorrelated feed is itself a noisy maximum, so r |D*| alone can
lie inside the feed's own wandering around the new level; the floor keeps
such a wander from passing for a return.) The fraction is a deadband in reading units, the usual guard
against an alarm chattering around its clear point (ANSI/ISA-18.2-2016,
alarm deadband) [common practice]. c = 3 and r = 0.4 are common practice,
not published values; the sqrt(1/m + 1/n) factor is the standard error of a
difference of two means of independent readings, which the medians and the
autocorrelation of a real feed only approximate, hence the wide c.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..errors import RuleError, StateFormatError

#: Version of :meth:`LevelCondition.state_dict`.
STATE_VERSION = 1
#: Readings kept to find the level before a run (covers runs up to capacity - before).
DEFAULT_CAPACITY = 96


def _robust_spread(x: np.ndarray) -> float:
    if x.size < 2:
        return 0.0
    mad = 1.4826 * float(np.median(np.abs(x - np.median(x))))
    return max(mad, float(np.std(x, ddof=1)))


class LevelCondition:
    """Tracks the departure of a feed's level from the level before an episode.

    Parameters
    ----------
    current_readings : int
        m, the readings in the current level's median (>= 1).
    before_readings : int
        n, the readings before the run that give the level before (>= 2).
    return_fraction : float
        r in (0, 1): the condition ends once the feed has come back more than
        (1 - r) of the largest departure.
    floor_sigmas : float
        c > 0: departures inside c standard errors are noise.
    resolution : float
        q >= 0, the reading's quantization step.
    capacity : int
        Readings kept (> n + m).
    """

    def __init__(self, current_readings: int = 8, before_readings: int = 24, return_fraction: float = 0.4,
                 floor_sigmas: float = 3.0, resolution: float = 0.0, capacity: int = DEFAULT_CAPACITY) -> None:
        if isinstance(current_readings, bool) or not isinstance(current_readings, int) or current_readings < 1:
            raise RuleError(f"level condition current_readings must be an integer >= 1, got {current_readings!r}")
        if isinstance(before_readings, bool) or not isinstance(before_readings, int) or before_readings < 2:
            raise RuleError(f"level condition before_readings must be an integer >= 2, got {before_readings!r}")
        if not 0 < return_fraction < 1:
            raise RuleError(f"level condition return_fraction must be in (0, 1), got {return_fraction!r}")
        if not (math.isfinite(floor_sigmas) and floor_sigmas > 0):
            raise RuleError(f"level condition floor_sigmas must be a number > 0, got {floor_sigmas!r}")
        if not (math.isfinite(resolution) and resolution >= 0):
            raise RuleError(f"level condition resolution must be a number >= 0, got {resolution!r}")
        if capacity <= before_readings + current_readings:
            raise RuleError(f"level condition capacity must exceed before_readings + current_readings, got {capacity}")
        self.current_readings = current_readings
        self.before_readings = before_readings
        self.return_fraction = float(return_fraction)
        self.floor_sigmas = float(floor_sigmas)
        self.resolution = float(resolution)
        self._ring = np.full(int(capacity), np.nan)
        self._pos = 0  # next write position
        self._count = 0  # finite readings written so far, capped at capacity
        self.reset()

    # ------------------------------------------------------------ properties
    @property
    def tracking(self) -> bool:
        """An episode is being compared with its level before."""
        return self._level_before is not None

    @property
    def established(self) -> bool:
        """The departure has been beyond the noise floor during this episode."""
        return self._established

    @property
    def level_before(self) -> float | None:
        return self._level_before

    @property
    def departure(self) -> float:
        """D_t, the current level less the level before (NaN when not tracking)."""
        return self._departure

    @property
    def peak_departure(self) -> float:
        """D*, the largest departure of the episode, signed (0 before it is established)."""
        return self._peak

    @property
    def capacity(self) -> int:
        """Readings kept."""
        return int(self._ring.size)

    def parameters(self) -> dict[str, Any]:
        return {"current_readings": self.current_readings, "before_readings": self.before_readings,
                "return_fraction": self.return_fraction, "floor_sigmas": self.floor_sigmas}

    # ---------------------------------------------------------------- public
    def observe(self, value: float) -> None:
        """Keep one reading (a missing or rejected one is not kept)."""
        if not math.isfinite(value):
            return
        self._ring[self._pos] = value
        self._pos = (self._pos + 1) % self._ring.size
        self._count = min(self._count + 1, self._ring.size)
        if self._level_before is not None:
            self._judge()

    def observe_many(self, values: Any) -> None:
        """Keep many finite readings, oldest first, while no episode is tracked (the same ring as
        :meth:`observe` one by one); while tracking, each is judged as it comes."""
        x = np.asarray(values, dtype=float).ravel()
        x = x[np.isfinite(x)]
        if self._level_before is not None:
            for value in x.tolist():
                self.observe(value)
            return
        cap = self._ring.size
        if x.size == 0:
            return
        if x.size > cap:
            x = x[-cap:]
        self._ring[(self._pos + np.arange(x.size)) % cap] = x
        self._pos = (self._pos + x.size) % cap
        self._count = min(self._count + x.size, cap)

    def start(self, run_steps: int) -> None:
        """An episode opened whose run began ``run_steps`` readings ago: freeze the level before it.

        Does nothing when too few readings are kept to tell a level.
        """
        kept = self._recent(self._count)
        skip = min(max(int(run_steps), 0), max(kept.size - self.before_readings, 0))
        before = kept[:kept.size - skip][-self.before_readings:]
        if before.size < 2:
            return
        self._level_before = float(np.median(before))
        m, n = self.current_readings, before.size
        self._floor = max(self.floor_sigmas * _robust_spread(before) * math.sqrt(1.0 / m + 1.0 / n),
                          self.resolution)
        self._established = False
        self._peak = 0.0
        self._judge()

    def holds(self) -> bool:
        """Whether the feed still sits away from the level before (see the module Notes)."""
        if self._level_before is None or not self._established:
            return False
        d = self._departure
        if not math.isfinite(d) or d * self._peak <= 0:
            return False
        return abs(d) > self.return_fraction * abs(self._peak) or abs(d) > self._floor

    def returned(self) -> bool:
        """The condition was established and the feed has come back (the alarm may clear now)."""
        return self._established and not self.holds()

    def stop(self) -> None:
        """The episode is over (cleared or accepted): stop comparing."""
        self.reset()

    def reset(self) -> None:
        self._level_before: float | None = None
        self._floor = 0.0
        self._established = False
        self._peak = 0.0
        self._departure = math.nan

    def describe(self) -> str:
        """One line for the event's detail."""
        if self._level_before is None or not math.isfinite(self._departure):
            return ""
        return (f"level {self._level_before + self._departure:.4g} against {self._level_before:.4g} before "
                f"the episode (departure {self._departure:+.3g}, largest {self._peak:+.3g})")

    # ------------------------------------------------------------ save/load
    def state_dict(self, compact: bool = False) -> dict[str, Any]:
        """The running state as plain JSON values, versioned (``compact``: the recent readings as a
        float array, for a checkpoint's binary part)."""
        recent = self._recent(self._count)
        return {"v": STATE_VERSION, "recent": recent if compact else [float(x) for x in recent],
                "level_before": self._level_before, "floor": self._floor, "established": self._established,
                "peak": self._peak}

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore what :meth:`state_dict` saved."""
        if not isinstance(state, dict) or state.get("v") != STATE_VERSION:
            raise StateFormatError(f"level condition state: version {state.get('v') if isinstance(state, dict) else state!r} "
                                   f"is not {STATE_VERSION}")
        self._ring[:] = np.nan
        recent = np.asarray(state["recent"], dtype=float)[-self._ring.size:]
        self._ring[:recent.size] = recent
        self._count = int(recent.size)
        self._pos = self._count % self._ring.size
        self.reset()
        if state["level_before"] is not None:
            self._level_before = float(state["level_before"])
            self._floor = float(state["floor"])
            self._established = bool(state["established"])
            self._peak = float(state["peak"])
            self._departure = self._current_level() - self._level_before

    # ------------------------------------------------------------- internals
    def _recent(self, count: int) -> np.ndarray:
        """The last ``count`` readings kept, oldest first."""
        count = min(count, self._count)
        idx = (self._pos - count + np.arange(count)) % self._ring.size
        return self._ring[idx]

    def _current_level(self) -> float:
        """The median of the last ``current_readings`` readings: ``np.median``'s value (the middle
        one, or the mean (a + b) / 2 of the middle two), sorted in Python: each reading of a
        tracked episode asks for it, and for a handful of values numpy's call costs ten times the sort."""
        count = min(self.current_readings, self._count)
        if count == 0:
            return math.nan
        ring, pos = self._ring, self._pos
        start = pos - count
        values = ring[start:pos].tolist() if start >= 0 else ring[start:].tolist() + ring[:pos].tolist()
        values.sort()
        middle = count // 2
        return values[middle] if count % 2 else (values[middle - 1] + values[middle]) / 2

    def _judge(self) -> None:
        d = self._current_level() - self._level_before
        self._departure = d
        if not math.isfinite(d):
            return
        if abs(d) > self._floor and abs(d) > abs(self._peak):
            self._peak = d
            self._established = True
