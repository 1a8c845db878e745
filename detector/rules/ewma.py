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
from .arl import ewma_limit_for_arl
from .contract import BudgetContext, BuildContext, LimitKey, RuleBase, RuleEntry, check_state
from .lifecycle import Assessment, LifecycleConfig

#: Default limit L in units of sigma_E (sigma mode).
DEFAULT_LIMIT_SIGMAS = 3.0


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

    def __init__(self, lam: float = 0.1, limit_sigmas: float = DEFAULT_LIMIT_SIGMAS, exact_limits: bool = False) -> None:
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

    #: Layout version of :meth:`state_dict`.
    STATE_VERSION = 1

    def state_dict(self) -> dict[str, Any]:
        """E_t and the steps since the last restart, as plain JSON values."""
        return {"v": self.STATE_VERSION, "average": self._e, "steps": self._steps}

    def load_state(self, state: Any) -> None:
        state = check_state(state, "rule 'ewma' chart", self.STATE_VERSION)
        self._e = float(state["average"])
        self._steps = int(state["steps"])

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


class EwmaRule(RuleBase):
    """The EWMA chart as an alarm rule; clears when |E| <= clear_fraction * limit.

    The average restarts after a re-anchoring of the level (it holds
    innovations scored against the old level).
    """

    name = "ewma"

    def __init__(self, chart: EwmaChart | None = None, clear_fraction: float = 0.5) -> None:
        self.chart = chart or EwmaChart()
        if not 0 <= clear_fraction <= 1:
            raise RuleError(f"ewma clear_fraction must be in [0, 1], got {clear_fraction!r}")
        self.clear_fraction = float(clear_fraction)

    def parameters(self) -> dict[str, Any]:
        return {**self.chart.parameters(), "clear_fraction": self.clear_fraction}

    def reset(self) -> None:
        self.chart.reset()

    def level_moved(self) -> None:
        self.chart.reset()

    def status(self) -> dict[str, Any]:
        return {"value": self.chart.value, "limit": self.chart.limit()}

    def state_dict(self) -> dict[str, Any]:
        return {"v": self.STATE_VERSION, "chart": self.chart.state_dict()}

    def load_state(self, state: Any) -> None:
        self.chart.load_state(self._check_state(state)["chart"])

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



# ------------------------------------------------------------ registry entry
def sigma_limits(options: dict[str, Any]) -> dict[str, Any] | None:
    lam = options["ewma_lam"]
    return None if lam is None else {"lam": float(lam), "limit_sigmas": float(options["ewma_limit_sigmas"])}


def budget_limits(ctx: BudgetContext, options: dict[str, Any]) -> dict[str, Any] | None:
    """L for ARL_0 = 1 / p_r (Gaussian only); None while the chart is off."""
    lam = options["ewma_lam"]
    if lam is None:
        return None
    return {"lam": float(lam), "limit_sigmas": ewma_limit_for_arl(lam, 1.0 / (ctx.rate * ctx.shares["ewma"]))}


def build(section: Any, ctx: BuildContext) -> EwmaRule | None:
    return None if section is None else EwmaRule(EwmaChart(section["lam"], section["limit_sigmas"]))


ENTRY = RuleEntry(
    name="ewma", kind="innovation", build=build,
    lifecycle=LifecycleConfig(1, 1, 12),
    splits_share_of="cusum", enabled_by="ewma_lam",
    limit_keys=(LimitKey("ewma_lam", None, low=0, low_open=True, high=1),
                LimitKey("ewma_limit_sigmas", DEFAULT_LIMIT_SIGMAS, low=0, low_open=True, modes=("sigma",))),
    required=("lam", "limit_sigmas"),
    sigma_limits=sigma_limits, budget_limits=budget_limits,
)
