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
from .lifecycle import Assessment


class SpikeRule:
    """|z_t| against a warning and an alarm limit.

    Parameters
    ----------
    warning_abs_z : float
        Raise a warning when |z_t| >= this (> 0).
    alarm_abs_z : float
        Raise an alarm when |z_t| >= this (>= ``warning_abs_z``).
    clear_abs_z : float, optional
        Clear when |z_t| < this (<= ``warning_abs_z``). Default: 0.75 of the
        warning limit (common practice: a deadband of a few tenths of the limit).
    """

    name = "spike"

    def __init__(self, warning_abs_z: float = 4.0, alarm_abs_z: float = 5.0, clear_abs_z: float | None = None):
        self.warning_abs_z = float(warning_abs_z)
        self.alarm_abs_z = float(alarm_abs_z)
        self.clear_abs_z = 0.75 * self.warning_abs_z if clear_abs_z is None else float(clear_abs_z)
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
