"""Cumulative registers to interval deltas: rollover and meter resets.

A counter feed reports a cumulative register (a water meter's total volume,
an energy meter's kWh). The model is fitted to what happens per interval,
the delta between the readings of two consecutive slots of the feed's grid.
:class:`CounterDeltas` turns each placed register reading into the delta of
its slot, and sorts every step into one of these kinds:

* ``"delta"``: r_t - r_{t-1} >= 0, the usual case.
* ``"rollover"``: the register wrapped around at its size R (a 6-digit
  register goes from 999,998 to 3). The delta is r_t + R - r_{t-1}. A drop is
  taken for a wrap only when that wrapped delta is plausible: at most
  (1 - ``reset_drop_fraction``) R, and, once at least
  :data:`MIN_HISTORY` deltas are known, at most :data:`WRAP_FACTOR` times the
  largest recent delta per slot (or :data:`WRAP_FLOOR_FRACTION` R, whichever
  is larger).
* ``"reset"``: a drop that is not a wrap and is larger than
  ``reset_drop_fraction`` of the last reading: the meter was reset or
  replaced. The slot's delta is missing (NaN) and the new reading becomes
  the baseline; the engine reports it as its own ``meter_reset`` event.
* ``"backward"``: a smaller drop that is not a wrap (a read jitter or a
  correction). It is passed on as a negative delta, so that the model
  scores it.
* ``"first"``: the first reading, with no previous one: NaN.
* ``"gap"``: the previous reading is not from the slot before, so the
  change covers several intervals: NaN (not comparable with one interval;
  the register itself keeps the total, so nothing is lost).
* ``"missing"``: an empty slot: NaN; the baseline stays.

Notes
-----
The reset criterion is a fraction of the *last reading* r_{t-1}, with or
without a register size: a replaced meter starts near zero, so its drop is
most of the last reading wherever the old register stood, while a rollover
(which drops by nearly R) is recognised first by the wrap rule above. The
factors are common practice for meter data validation, not published values.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass
from typing import Any

from .errors import ConfigError
from .events import AlarmEvent

#: Recent per-slot deltas kept to judge whether a wrapped delta is plausible.
HISTORY_DELTAS = 100
#: Deltas needed before the recent ones are used to judge a wrap.
MIN_HISTORY = 10
#: A wrapped delta may be at most this many times the largest recent delta per slot.
WRAP_FACTOR = 20.0
#: ... or this fraction of the register size, whichever is larger.
WRAP_FLOOR_FRACTION = 1e-3

KINDS = ("delta", "rollover", "reset", "backward", "first", "gap", "missing")


@dataclass(frozen=True)
class CounterStep:
    """The delta of one slot and what kind of step it was.

    Attributes
    ----------
    delta : float
        The interval delta fed to the model; NaN when not scoreable.
    kind : str
        One of :data:`KINDS` (see the module docstring).
    previous : float or None
        The register reading it was taken against.
    reading : float
        The register reading of this slot.
    """

    delta: float
    kind: str
    previous: float | None
    reading: float


class CounterDeltas:
    """Interval deltas of one cumulative register, one slot at a time.

    Parameters
    ----------
    register_size : float or None
        R, the rollover modulus (1e6 for a 6-digit register); None when the
        register never wraps.
    reset_drop_fraction : float
        A drop larger than this fraction of the last reading, not explained
        by a wrap, is a meter reset or replacement (0 < fraction <= 1).
    """

    def __init__(self, register_size: float | None = None, reset_drop_fraction: float = 0.5) -> None:
        if register_size is not None and not (isinstance(register_size, (int, float))
                                              and not isinstance(register_size, bool)
                                              and math.isfinite(register_size) and register_size > 0):
            raise ConfigError(f"register_size must be a finite number > 0 or None, got {register_size!r}")
        if isinstance(reset_drop_fraction, bool) or not isinstance(reset_drop_fraction, (int, float)) \
                or not 0 < reset_drop_fraction <= 1:
            raise ConfigError(f"reset_drop_fraction must be in (0, 1], got {reset_drop_fraction!r}")
        self.register_size = None if register_size is None else float(register_size)
        self.reset_drop_fraction = float(reset_drop_fraction)
        self.last_reading: float | None = None
        self.last_slot: int | None = None
        self._recent: deque[float] = deque(maxlen=HISTORY_DELTAS)
        self.counts = {kind: 0 for kind in KINDS}

    def parameters(self) -> dict[str, Any]:
        return {"register_size": self.register_size, "reset_drop_fraction": self.reset_drop_fraction}

    def _is_wrap(self, wrapped: float, slots: int) -> bool:
        size = self.register_size
        if size is None or not 0 <= wrapped <= (1.0 - self.reset_drop_fraction) * size:
            return False
        if len(self._recent) < MIN_HISTORY:
            return True
        bound = max(WRAP_FACTOR * max(self._recent) * slots, WRAP_FLOOR_FRACTION * size)
        return wrapped <= bound

    def step(self, slot: int, reading: float) -> CounterStep:
        """The delta of ``slot`` whose register reading is ``reading`` (NaN: an empty slot)."""
        reading = float(reading)
        if not math.isfinite(reading):
            self.counts["missing"] += 1
            return CounterStep(math.nan, "missing", self.last_reading, reading)
        previous, previous_slot = self.last_reading, self.last_slot
        self.last_reading, self.last_slot = reading, int(slot)
        if previous is None:
            self.counts["first"] += 1
            return CounterStep(math.nan, "first", None, reading)
        slots = int(slot) - previous_slot
        raw = reading - previous
        if raw >= 0:
            kind, delta = "delta", raw
        elif self._is_wrap(raw + (self.register_size or 0.0), slots):
            kind, delta = "rollover", raw + self.register_size
        elif -raw > self.reset_drop_fraction * abs(previous):
            self.counts["reset"] += 1
            return CounterStep(math.nan, "reset", previous, reading)
        else:
            kind, delta = "backward", raw
        if slots != 1:
            self.counts["gap"] += 1
            return CounterStep(math.nan, "gap", previous, reading)
        self.counts[kind] += 1
        if delta >= 0:
            self._recent.append(delta)
        return CounterStep(delta, kind, previous, reading)

    def reset_event(self, feed_id: str, step: CounterStep, ts: Any, model_version: int | None) -> AlarmEvent:
        """The ``meter_reset`` warning of a ``reset`` step at ``ts`` (its delta is not scored)."""
        size = f"a {self.register_size:g} register" if self.register_size else "a register with no rollover size"
        detail = (f"register went from {step.previous:.10g} to {step.reading:.10g}, a drop of more than "
                  f"{self.reset_drop_fraction:g} of the last reading and no rollover of {size}: meter reset or "
                  "replacement; this interval's delta is not scored")
        return AlarmEvent(feed_id=feed_id, rule="meter_reset", severity="warning", start=ts, end=ts,
                          value_at_onset=step.reading,
                          parameters={**self.parameters(), "previous_reading": step.previous},
                          model_version=model_version, detail=detail)

    # ------------------------------------------------------------ save/load
    def to_dict(self) -> dict[str, Any]:
        return {"register_size": self.register_size, "reset_drop_fraction": self.reset_drop_fraction,
                "last_reading": self.last_reading, "last_slot": self.last_slot, "recent": list(self._recent),
                "counts": dict(self.counts)}

    _SAVED = object()

    @classmethod
    def from_dict(cls, data: dict[str, Any], *, register_size: Any = _SAVED,
                  reset_drop_fraction: Any = _SAVED) -> "CounterDeltas":
        """Load :meth:`to_dict`; the register settings may be replaced by current ones."""
        out = cls(data["register_size"] if register_size is cls._SAVED else register_size,
                  data["reset_drop_fraction"] if reset_drop_fraction is cls._SAVED else reset_drop_fraction)
        out.last_reading = data["last_reading"]
        out.last_slot = data["last_slot"]
        out._recent.extend(float(x) for x in data["recent"])
        out.counts.update({k: int(v) for k, v in data["counts"].items()})
        return out
