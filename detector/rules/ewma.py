"""Small sustained shifts: an EWMA chart on the standardized innovations.

Notes
-----
The exponentially weighted moving average of z_t (Roberts 1959; Lucas &
Saccucci 1990):

.. math::

    E_t = (1 - \\lambda) E_{t-1} + \\lambda z_t, \\qquad E_0 = 0

signals when |E_t| > L sigma_E. With the asymptotic limits used by Lucas &
Saccucci (1990, Table 3), sigma_E = sqrt(lambda / (2 - lambda)); the exact
limits use sigma_E,t = sqrt(lambda / (2 - lambda) (1 - (1 - lambda)^{2t}))
(Montgomery 2013, section 9.2). lambda = 0.5, L = 3.071 gives an in-control
ARL of 500 and an ARL of 17.5 at a shift of 1 (Lucas & Saccucci 1990,
Table 3). After a signal the average restarts from 0.
"""

from __future__ import annotations

import math
from typing import Any

from ..errors import RuleError
from ..innovation import Innovation
from .lifecycle import Assessment


def ewma_step(e, z, lam):
    """One EWMA step, (1 - lam) e + lam z; works on floats and numpy arrays."""
    return (1.0 - lam) * e + lam * z


def ewma_sigma(lam: float, steps: int | None = None) -> float:
    """sigma_E: asymptotic (``steps`` None) or after ``steps`` updates."""
    base = lam / (2.0 - lam)
    if steps is None:
        return math.sqrt(base)
    return math.sqrt(base * (1.0 - (1.0 - lam) ** (2 * steps)))


class EwmaChart:
    """An EWMA chart on z, one value at a time.

    Parameters
    ----------
    lam : float
        Smoothing weight lambda in (0, 1].
    limit_sigmas : float
        L, the limit in units of sigma_E (> 0).
    exact_limits : bool
        Use the time-varying limits of the first steps instead of the
        asymptotic ones.
    """

    def __init__(self, lam: float = 0.1, limit_sigmas: float = 3.0, exact_limits: bool = False) -> None:
        if not (0 < lam <= 1):
            raise RuleError(f"ewma lam must be in (0, 1], got {lam!r}")
        if not (math.isfinite(limit_sigmas) and limit_sigmas > 0):
            raise RuleError(f"ewma limit_sigmas must be a finite number > 0, got {limit_sigmas!r}")
        self.lam = float(lam)
        self.limit_sigmas = float(limit_sigmas)
        self.exact_limits = bool(exact_limits)
        self.reset()

    def parameters(self) -> dict[str, Any]:
        return {"lam": self.lam, "limit_sigmas": self.limit_sigmas, "exact_limits": self.exact_limits}

    @property
    def value(self) -> float:
        return self._e

    def limit(self) -> float:
        """The current control limit L sigma_E."""
        steps = self._steps if self.exact_limits else None
        return self.limit_sigmas * ewma_sigma(self.lam, steps)

    def reset(self) -> None:
        self._e = 0.0
        self._steps = 0

    def update(self, z: float) -> int:
        """Add one z (NaN skipped); return +1 / -1 on a signal (and restart), else 0."""
        if not math.isfinite(z):
            return 0
        self._e = float(ewma_step(self._e, z, self.lam))
        self._steps += 1
        limit = self.limit()
        if abs(self._e) > limit:
            direction = 1 if self._e > 0 else -1
            self.reset()
            return direction
        return 0


class EwmaRule:
    """The EWMA chart as an alarm rule; clears when |E| <= clear_fraction * limit."""

    name = "ewma"

    def __init__(self, chart: EwmaChart | None = None, clear_fraction: float = 0.5) -> None:
        self.chart = chart or EwmaChart()
        if not 0 <= clear_fraction <= 1:
            raise RuleError(f"ewma clear_fraction must be in [0, 1], got {clear_fraction!r}")
        self.clear_fraction = float(clear_fraction)

    def parameters(self) -> dict[str, Any]:
        return {**self.chart.parameters(), "clear_fraction": self.clear_fraction}

    def assess(self, innovation: Innovation) -> Assessment | None:
        z = innovation.z
        if not math.isfinite(z):
            return None
        before = self.chart.value
        direction = self.chart.update(z)
        if direction:
            e = float(ewma_step(before, z, self.chart.lam))
            detail = (f"sustained {'upward' if direction > 0 else 'downward'} shift: EWMA of z {e:+.3f} "
                      f"beyond +-{self.chart.limit_sigmas:.3g} sigma_E (lambda {self.chart.lam:.3g})")
            return Assessment("alarm", False, abs(z), detail)
        return Assessment(None, abs(self.chart.value) <= self.clear_fraction * self.chart.limit(), abs(z))

