"""Engineering range rule: a reading outside what the instrument can physically report.

A negative flow, a level above the tank's top: such a reading is an
instrument or transmission fault, not a process event. It raises an alarm
at once (no on-delay) and is never fed to the model (the monitor treats its
slot as missing), so it cannot distort the forecasts.
"""

from __future__ import annotations

import math
from typing import Any

from ..errors import RuleError
from .contract import BuildContext, RuleBase, RuleEntry
from .lifecycle import Assessment, LifecycleConfig


class RangeRule(RuleBase):
    """low <= reading <= high, either bound optional; an infinite reading is always out of range.

    Parameters
    ----------
    low, high : float or None
        The physically possible range, in reading units (inclusive).

    The rule holds no running state.
    """

    name = "range"

    def __init__(self, low: float | None = None, high: float | None = None) -> None:
        for label, bound in (("low", low), ("high", high)):
            if bound is not None and not math.isfinite(bound):
                raise RuleError(f"range {label} must be a finite number or None, got {bound!r}")
        if low is not None and high is not None and low > high:
            raise RuleError(f"range low ({low}) must not exceed high ({high})")
        self.low = None if low is None else float(low)
        self.high = None if high is None else float(high)

    def parameters(self) -> dict[str, Any]:
        return {"low": self.low, "high": self.high}

    def contains(self, value: float) -> bool:
        """True for a value in range; NaN (a missing slot) counts as in range."""
        if math.isnan(value):
            return True
        if math.isinf(value):
            return False
        if self.low is not None and value < self.low:
            return False
        if self.high is not None and value > self.high:
            return False
        return True

    def assess(self, value: float) -> Assessment | None:
        """None for a missing slot; an alarm outside the range; clear inside."""
        if math.isnan(value):
            return None
        if self.contains(value):
            return Assessment(None, True)
        if math.isinf(value):
            where = "infinite"
        elif self.low is not None and value < self.low:
            where = f"below the engineering range low {self.low:g}"
        else:
            where = f"above the engineering range high {self.high:g}"
        return Assessment("alarm", False, math.nan, f"reading {value:.6g} is {where}; not fed to the model")


def build(section: Any, ctx: BuildContext) -> RangeRule | None:
    config = ctx.config
    if config.range_low is None and config.range_high is None:
        return None
    return RangeRule(config.range_low, config.range_high)


ENTRY = RuleEntry(name="range", kind="value", build=build, lifecycle=LifecycleConfig(1, 1, 1))
