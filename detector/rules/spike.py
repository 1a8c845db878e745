"""Spike rule: a single reading far from its one-step forecast.

Notes
-----
With z_t = v_t / sqrt(F_t) standard normal under the model, the two-sided
rate of |z_t| >= c per reading is

.. math::

    p = 2\\,(1 - \\Phi(c)), \\qquad c = \\Phi^{-1}(1 - p/2),

and the run length to a false alarm is geometric with mean 1/p: 370.4
readings at c = 3 (the Shewhart chart; Montgomery, Introduction to
Statistical Quality Control, 7th ed., 2013, section 6.2) [exact formula].

The rule raises a warning at ``warning_abs_z``, an alarm at ``alarm_abs_z``
and clears below ``clear_abs_z`` (the deadband lies between the clear level
and the warning level).
"""

from __future__ import annotations

import math
from typing import Any

from ..errors import RuleError
from ..innovation import Innovation
from .contract import BudgetContext, BuildContext, LimitKey, RuleBase, RuleEntry
from .lifecycle import Assessment, LifecycleConfig
from .tail_limits import empirical_abs_limit, gaussian_abs_limit

#: Default limits (sigma mode).
DEFAULT_WARNING_ABS_Z = 4.0
DEFAULT_ALARM_ABS_Z = 5.0
#: Default clear level as a fraction of the warning limit (common practice: a
#: deadband of a few tenths of the limit).
CLEAR_FRACTION = 0.75


class SpikeRule(RuleBase):
    """|z_t| against a warning and an alarm limit.

    Parameters
    ----------
    warning_abs_z : float
        Raise a warning when |z_t| >= this (> 0).
    alarm_abs_z : float
        Raise an alarm when |z_t| >= this (>= ``warning_abs_z``).
    clear_abs_z : float, optional
        Clear when |z_t| < this (<= ``warning_abs_z``). Default:
        :data:`CLEAR_FRACTION` of the warning limit.

    The rule holds no running state.
    """

    name = "spike"

    def __init__(self, warning_abs_z: float = DEFAULT_WARNING_ABS_Z, alarm_abs_z: float = DEFAULT_ALARM_ABS_Z,
                 clear_abs_z: float | None = None):
        self.warning_abs_z = float(warning_abs_z)
        self.alarm_abs_z = float(alarm_abs_z)
        self.clear_abs_z = CLEAR_FRACTION * self.warning_abs_z if clear_abs_z is None else float(clear_abs_z)
        if not (math.isfinite(self.warning_abs_z) and self.warning_abs_z > 0):
            raise RuleError(f"spike warning_abs_z must be a finite number > 0, got {warning_abs_z!r}")
        if not (math.isfinite(self.alarm_abs_z) and self.alarm_abs_z >= self.warning_abs_z):
            raise RuleError(f"spike alarm_abs_z ({alarm_abs_z!r}) must be finite and >= warning_abs_z "
                            f"({self.warning_abs_z})")
        if not (0 < self.clear_abs_z <= self.warning_abs_z):
            raise RuleError(f"spike clear_abs_z must be in (0, warning_abs_z={self.warning_abs_z}], "
                            f"got {clear_abs_z!r}")

    def parameters(self) -> dict[str, Any]:
        return {"warning_abs_z": self.warning_abs_z, "alarm_abs_z": self.alarm_abs_z,
                "clear_abs_z": self.clear_abs_z}

    def severity_of(self, z: float) -> str | None:
        """The severity |z| reaches, or None (NaN gives None)."""
        a = abs(z)
        if a >= self.alarm_abs_z:
            return "alarm"
        if a >= self.warning_abs_z:
            return "warning"
        return None

    def assess(self, innovation: Innovation) -> Assessment | None:
        """The verdict on one innovation; None for a missing reading."""
        z = innovation.z
        if not math.isfinite(z):
            return None
        a = abs(z)
        severity = self.severity_of(z)
        if severity is not None:
            limit = self.alarm_abs_z if severity == "alarm" else self.warning_abs_z
            detail = (f"reading {innovation.value:.6g} is {a:.2f} sigma from its forecast "
                      f"{innovation.forecast:.6g} (|z| >= {severity} limit {limit:.3g})")
            return Assessment(severity, False, a, detail)
        return Assessment(None, a < self.clear_abs_z, a)


# ------------------------------------------------------------ registry entry
def sigma_limits(options: dict[str, Any]) -> dict[str, Any]:
    warning = options["warning_abs_z"]
    clear = options["clear_abs_z"]
    return {"warning_abs_z": float(warning), "alarm_abs_z": float(options["alarm_abs_z"]),
            "clear_abs_z": float(CLEAR_FRACTION * warning if clear is None else clear)}


def budget_limits(ctx: BudgetContext, options: dict[str, Any]) -> dict[str, Any]:
    """Warning at rate p_r, alarm at p_r * alarm_rate_ratio; the larger of the Gaussian and empirical limits."""
    ratio = options["alarm_rate_ratio"]
    if not 0 < ratio <= 1:
        raise RuleError(f"alarm_rate_ratio must be in (0, 1], got {ratio!r}")
    ctx.budget["alarm_rate_ratio"] = float(ratio)
    share = ctx.shares.get("spike", 0.0)
    spike: dict[str, Any] = {}
    for level, rate in (("warning", ctx.rate * share), ("alarm", ctx.rate * share * ratio)):
        gauss = gaussian_abs_limit(rate)
        emp, method = empirical_abs_limit(ctx.abs_z, rate, ctx.confidence, seed=ctx.seed)
        spike[f"gaussian_{level}_abs_z"] = gauss
        spike[f"empirical_{level}_abs_z"] = None if math.isnan(emp) else emp
        spike[f"{level}_abs_z"] = gauss if math.isnan(emp) else max(gauss, emp)
        spike[f"{level}_method"] = method
    spike["alarm_abs_z"] = max(spike["alarm_abs_z"], spike["warning_abs_z"])
    spike["clear_abs_z"] = CLEAR_FRACTION * spike["warning_abs_z"]
    return spike


def build(section: Any, ctx: BuildContext) -> SpikeRule:
    return SpikeRule(section["warning_abs_z"], section["alarm_abs_z"], section["clear_abs_z"])


ENTRY = RuleEntry(
    name="spike", kind="innovation", build=build,
    # a short off-delay keeps a spike and its immediate neighbours, or the
    # first readings of a large level shift, in one episode
    lifecycle=LifecycleConfig(1, 1, 3),
    budget_share=0.35,
    limit_keys=(LimitKey("warning_abs_z", DEFAULT_WARNING_ABS_Z, low=0, low_open=True, modes=("sigma",)),
                LimitKey("alarm_abs_z", DEFAULT_ALARM_ABS_Z, low=0, low_open=True, modes=("sigma",)),
                LimitKey("clear_abs_z", None, low=0, low_open=True, modes=("sigma",)),
                LimitKey("alarm_rate_ratio", 0.1, low=0, low_open=True, high=1, modes=("budget",))),
    required=("warning_abs_z", "alarm_abs_z", "clear_abs_z"),
    sigma_limits=sigma_limits, budget_limits=budget_limits,
)
