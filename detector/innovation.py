"""The per-reading output of the recursive filter.

Glossary (Durbin & Koopman 2012, section 4.3):

=========  ===============  ===================================================
symbol     name in code     meaning
=========  ===============  ===================================================
y_t        ``value``        the reading (NaN when the slot is missing)
Z a_t + d  ``forecast``     one-step forecast of y_t made before it arrived
v_t        ``error``        innovation, y_t - forecast
F_t        ``variance``     variance of v_t, Z P_t Z' + H
z_t        ``z``            standardized innovation, v_t / sqrt(F_t)
=========  ===============  ===================================================
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime


@dataclass(slots=True)
class Innovation:
    """One step of a :class:`~leadline.detector.stream.Stream`.

    Treat it as read-only. It is not a frozen dataclass only because a
    frozen one costs about 1 us more to build, which is most of a
    steady-state filter step.

    Attributes
    ----------
    step : int
        Index of the step in the model's own grid (0 = first fitted point).
    value : float
        The reading, NaN for a missing slot.
    forecast : float
        One-step forecast Z a_t + d_t of the reading, on the reading's scale.
    error : float
        v_t = value - forecast; NaN when the slot is missing.
    variance : float
        F_t, the variance of v_t (defined for a missing slot too).
    z : float
        v_t / sqrt(F_t); NaN when missing.
    lower, upper : float
        The forecast interval forecast -/+ q * sqrt(F_t) at ``level``.
    level : float
        Coverage of the interval, for example 0.95.
    absorbed : bool
        Whether the reading moved the state (False for a missing slot and
        for ``update(value, absorb=False)``).
    timestamp : datetime or None
        The slot's time where the stream knows its grid.
    """

    step: int
    value: float
    forecast: float
    error: float
    variance: float
    z: float
    lower: float
    upper: float
    level: float
    absorbed: bool
    timestamp: datetime | None = None

    @property
    def is_missing(self) -> bool:
        return math.isnan(self.value)

    @property
    def std(self) -> float:
        """sqrt(F_t), the standard deviation of the one-step forecast error."""
        return math.sqrt(self.variance)


def stamped(inn: Innovation, timestamp: datetime | None) -> Innovation:
    """A copy of ``inn`` with its ``timestamp`` set (``dataclasses.replace`` costs about four times more)."""
    return Innovation(inn.step, inn.value, inn.forecast, inn.error, inn.variance, inn.z, inn.lower, inn.upper,
                      inn.level, inn.absorbed, timestamp)
