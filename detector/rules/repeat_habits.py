"""A feed's own habit of repeating a reading, learnt from its training window.

A sensor that reports the same value often is not stuck: a quantized meter,
a flow parked at a set point, a register that does not move at night. The
model's Gaussian one-step distribution knows nothing of this (for a feed
quantized to whole units with a spread below one unit it gives a repeat a
probability far too small), so the flatline rule also asks how often the
feed repeated *this* value in training.

Notes
-----
From the training readings y_1..y_n (missing ones break the pairs), for
each value v the feed held:

    o_v = #{t : y_{t-1} = v},   r_v = #{t : y_{t-1} = v, y_t = v}

The values held at least ``MIN_OCCURRENCES`` times keep their own counts
(the ``MAX_VALUES`` most frequent); all other values pool into one rate
rho = sum r / sum o over them (or the overall rate when there are none).
The probability that the feed repeats v at the next reading is the
smoothed estimate

.. math::

    \\hat p_v = \\frac{r_v + a\\,\\rho}{o_v + a}

with a = ``PRIOR_WEIGHT`` pseudo-observations at the pooled rate (additive
smoothing toward a prior; Gelman et al., Bayesian Data Analysis, 3rd ed.,
section 2.4, the beta-binomial model) [from memory], so a value seen a few
times is judged by the pool and an unseen one by the pool alone. The
estimate is capped at ``MAX_PROBABILITY`` so that any run, however
habitual, is eventually reported when it outlasts its habit by far.

Under a first-order Markov model of repeats these are the transition
probabilities, and the product over a run is its probability, which the
flatline rule compares with its limit (its Ville bound then holds under
that model). The longest run of each kept value is stored too: a run is
never reported before it outlasts the longest the feed showed in training.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import StateFormatError

#: Values with fewer predecessors than this pool into one rate.
MIN_OCCURRENCES = 5
#: At most this many values keep their own counts.
MAX_VALUES = 32
#: Pseudo-observations at the pooled rate (the prior's weight).
PRIOR_WEIGHT = 2.0
#: Repeat probabilities are capped here.
MAX_PROBABILITY = 0.999
#: Version of the JSON form.
FORMAT_VERSION = 1


@dataclass(frozen=True)
class RepeatHabits:
    """How often a feed repeated its readings in training.

    Attributes
    ----------
    pooled_rate : float
        rho, the repeat rate of the values without counts of their own.
    values : dict of float to (repeats, occurrences, longest_run)
        r_v, o_v and the longest run of each kept value.
    tolerance : float
        Two readings count as the same when they differ by at most this.
    """

    pooled_rate: float
    values: dict[float, tuple[int, int, int]] = field(default_factory=dict)
    tolerance: float = 0.0

    def _lookup(self, value: float) -> tuple[int, int, int] | None:
        hit = self.values.get(value)
        if hit is not None or self.tolerance <= 0:
            return hit
        for v, counts in self.values.items():
            if abs(v - value) <= self.tolerance:
                return counts
        return None

    def probability(self, value: float) -> float:
        """p_v: the probability that the reading ``value`` is repeated at the next step (module Notes)."""
        counts = self._lookup(value)
        r, o = (counts[0], counts[1]) if counts is not None else (0, 0)
        p = (r + PRIOR_WEIGHT * self.pooled_rate) / (o + PRIOR_WEIGHT)
        return min(max(p, 0.0), MAX_PROBABILITY)

    def longest_run(self, value: float) -> int:
        """The longest run of repeats of ``value`` in training (0 when it kept no counts)."""
        counts = self._lookup(value)
        return 0 if counts is None else counts[2]

    def to_json(self) -> dict[str, Any]:
        return {"v": FORMAT_VERSION, "pooled_rate": self.pooled_rate, "tolerance": self.tolerance,
                "values": [[v, r, o, run] for v, (r, o, run) in self.values.items()]}

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> "RepeatHabits":
        if not isinstance(data, dict) or data.get("v") != FORMAT_VERSION:
            raise StateFormatError(f"repeat habits: format version "
                                   f"{data.get('v') if isinstance(data, dict) else data!r} is not {FORMAT_VERSION}")
        try:
            values = {float(v): (int(r), int(o), int(run)) for v, r, o, run in data["values"]}
            return cls(float(data["pooled_rate"]), values, float(data.get("tolerance", 0.0)))
        except (KeyError, TypeError, ValueError) as exc:
            raise StateFormatError(f"repeat habits are malformed: {exc}") from exc


def learn_repeat_habits(values: Any, tolerance: float = 0.0) -> RepeatHabits:
    """Count the repeats of a training window (see the module Notes).

    Parameters
    ----------
    values : array_like
        The training readings in slot order; NaN for missing slots.
    tolerance : float
        Two readings within this of each other are the same.
    """
    y = np.asarray(values, dtype=float).ravel()
    prev, cur = y[:-1], y[1:]
    valid = np.isfinite(prev) & np.isfinite(cur)
    prev, cur = prev[valid], cur[valid]
    same = np.abs(cur - prev) <= tolerance
    overall = float(same.mean()) if same.size else 0.0
    if prev.size == 0:
        return RepeatHabits(overall, {}, float(tolerance))
    keys, inverse, occurrences = np.unique(prev, return_inverse=True, return_counts=True)
    repeats = np.bincount(inverse, weights=same.astype(float), minlength=keys.size)
    kept = [i for i in np.argsort(-occurrences, kind="stable")[:MAX_VALUES] if occurrences[i] >= MIN_OCCURRENCES]
    runs = _longest_runs(y, tolerance)
    table = {float(keys[i]): (int(repeats[i]), int(occurrences[i]), runs.get(float(keys[i]), 0)) for i in kept}
    rest = np.ones(keys.size, dtype=bool)
    rest[kept] = False
    rest_o = float(occurrences[rest].sum())
    pooled = float(repeats[rest].sum()) / rest_o if rest_o > 0 else overall
    return RepeatHabits(pooled, table, float(tolerance))


def _longest_runs(y: np.ndarray, tolerance: float) -> dict[float, int]:
    """The longest run of repeats (steps after the first reading) of each value."""
    runs: dict[float, int] = {}
    start_value = math.nan
    length = 0
    for x in y.tolist():
        if x == x and start_value == start_value and abs(x - start_value) <= tolerance:
            length += 1
            if length > runs.get(start_value, 0):
                runs[start_value] = length
        else:
            start_value, length = x, 0
    return runs
