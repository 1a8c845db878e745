"""How the engine treats one feed: :class:`FeedSettings` and its validation.

Every setting is checked when the settings are built, so a bad value is a
:class:`~leadline.detector.errors.ConfigError` naming the setting at load
time, not a failure at the end of a feed's learning phase. The defaults
written here are the only ones: the config files read them from these
fields (:mod:`leadline.adapters.config.feeds`).
"""

from __future__ import annotations

import inspect
import math
from dataclasses import dataclass, field, replace
from typing import Any

from .errors import ConfigError, RuleError, SpecError
from .rules import FeedMonitor, MonitorConfig, budget_thresholds, sigma_thresholds
from .seasonality import CalendarTerms, zone_info
from .spec import ModelSpec

#: Arguments of budget_thresholds that the engine sets itself (not settable in ``budget_options``).
_BUDGET_RESERVED = {"residuals", "interval_s", "false_alarms", "per_s", "values"}


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


@dataclass(frozen=True)
class FeedSettings:
    """How the engine treats one feed.

    Parameters
    ----------
    spec : ModelSpec or "auto"
    calendar : CalendarTerms or None
        Calendar regressors (daily and weekly cycles, day flags).
    seasonal_period : int or None
        With "auto": a short seasonal period (<= 24 slots) also tried.
    interval_s : float or None
        Nominal reading interval; None: the median spacing of the learning window.
    grid_tolerance : float
        Largest distance of a reading from its slot, as a fraction of the interval.
    train_points, train_span_s : int, float
        Learning ends at ``train_points`` readings or ``train_span_s`` seconds,
        whichever comes first ...
    min_train_points : int
        ... but never with fewer readings than this.
    refit_every_s : float or None
        Scheduled refits, in reading time; None: no schedule.
    refit_window_points : int
        Slots of the rolling refit window.
    diagnostics_refit : bool
        Request a refit when the diagnostics degrade (:mod:`.diagnostics`).
    threshold_mode : {"budget", "sigma"}
    false_alarms_per_week : float
        The false-alarm budget of budget mode.
    sigma_limits : dict or None
        Keyword arguments of :func:`~leadline.detector.rules.sigma_thresholds` (sigma mode).
    budget_options : dict or None
        Further keyword arguments of
        :func:`~leadline.detector.rules.budget_thresholds` (``shares``,
        ``ewma_lam``, ``cusum_k``, ``noise_window``, ...).
    monitor : MonitorConfig
        The rules' options: engineering range, stale limit, flatline
        tolerance and resolution, lifecycles, rules, insulation. Its
        ``thresholds`` and ``interval_s`` are set by the engine from the fit
        and the grid; whatever they hold here is ignored.
    counter : bool
        The feed is a cumulative register; the model sees interval deltas.
    register_size : float or None
        The register's rollover modulus (1e6 for a 6-digit register).
    reset_drop_fraction : float
        A drop larger than this fraction of the last reading, and not a
        rollover, is a meter reset or replacement (:mod:`.counters`).
    future_tolerance_s : float or None
        Readings more than this ahead of the engine's clock (the last
        tick) are dropped and counted; None disables the check.
    level : float
        Coverage of the forecast interval in events.
    timezone : str or None
        IANA time zone of the cycles "auto" looks for when no calendar is
        given (a calendar carries its own); None: UTC.
    incident_gap_slots : int
        An event opening at most this many grid intervals after the
        feed's last event cleared joins its incident (:mod:`.incidents`).

    Raises
    ------
    ConfigError
        Naming the setting and what is allowed.
    """

    spec: ModelSpec | str = "auto"
    calendar: CalendarTerms | None = None
    seasonal_period: int | None = None
    interval_s: float | None = None
    grid_tolerance: float = 0.25
    train_points: int = 2000
    train_span_s: float = 14 * 86400.0
    min_train_points: int = 200
    refit_every_s: float | None = 86400.0
    refit_window_points: int = 2000
    diagnostics_refit: bool = True
    threshold_mode: str = "budget"
    false_alarms_per_week: float = 0.2
    sigma_limits: dict[str, Any] | None = None
    budget_options: dict[str, Any] | None = None
    monitor: MonitorConfig = field(default_factory=MonitorConfig)
    counter: bool = False
    register_size: float | None = None
    reset_drop_fraction: float = 0.5
    future_tolerance_s: float | None = 3600.0
    level: float = 0.95
    timezone: str | None = None
    incident_gap_slots: int = 12

    def __post_init__(self) -> None:
        def bad(key: str, expected: str) -> ConfigError:
            return ConfigError(f"feed settings: {key} must be {expected}, got {getattr(self, key)!r}")

        if not (isinstance(self.spec, ModelSpec) or self.spec == "auto"):
            raise bad("spec", "a ModelSpec or 'auto'")
        if self.calendar is not None and not isinstance(self.calendar, CalendarTerms):
            raise bad("calendar", "CalendarTerms or None")
        if self.seasonal_period is not None and (isinstance(self.seasonal_period, bool)
                                                 or not isinstance(self.seasonal_period, int)
                                                 or not 2 <= self.seasonal_period <= 24):
            raise bad("seasonal_period", "an integer in [2, 24] or None")
        if self.interval_s is not None and not (_is_number(self.interval_s) and self.interval_s > 0):
            raise bad("interval_s", "a number > 0 (seconds) or None")
        if not (_is_number(self.grid_tolerance) and 0 < self.grid_tolerance <= 0.5):
            raise bad("grid_tolerance", "a number in (0, 0.5]")
        for key, low in (("train_points", 10), ("min_train_points", 10), ("refit_window_points", 10)):
            value = getattr(self, key)
            if isinstance(value, bool) or not isinstance(value, int) or value < low:
                raise bad(key, f"an integer >= {low}")
        if self.min_train_points > self.train_points:
            raise bad("min_train_points", f"at most train_points ({self.train_points})")
        if not (_is_number(self.train_span_s) and self.train_span_s > 0):
            raise bad("train_span_s", "a number > 0 (seconds)")
        if self.refit_every_s is not None and not (_is_number(self.refit_every_s) and self.refit_every_s > 0):
            raise bad("refit_every_s", "a number > 0 (seconds) or None")
        if not isinstance(self.diagnostics_refit, bool):
            raise bad("diagnostics_refit", "true or false")
        if self.threshold_mode not in ("budget", "sigma"):
            raise bad("threshold_mode", "'budget' or 'sigma'")
        if not (_is_number(self.false_alarms_per_week) and self.false_alarms_per_week > 0):
            raise bad("false_alarms_per_week", "a number > 0")
        if self.sigma_limits is not None:
            if not isinstance(self.sigma_limits, dict):
                raise bad("sigma_limits", "a table of sigma_thresholds options")
            allowed = set(inspect.signature(sigma_thresholds).parameters)
            unknown = sorted(set(self.sigma_limits) - allowed)
            if unknown:
                raise ConfigError(f"feed settings: sigma_limits has unknown keys {unknown}; allowed: {sorted(allowed)}")
            try:
                sigma_thresholds(**self.sigma_limits)
            except RuleError as exc:
                raise ConfigError(f"feed settings: sigma_limits: {exc}") from exc
        if self.budget_options is not None:
            if not isinstance(self.budget_options, dict):
                raise bad("budget_options", "a table of budget_thresholds options")
            allowed = set(inspect.signature(budget_thresholds).parameters) - _BUDGET_RESERVED
            unknown = sorted(set(self.budget_options) - allowed)
            if unknown:
                raise ConfigError(f"feed settings: budget_options has unknown keys {unknown}; "
                                  f"allowed: {sorted(allowed)}")
        if not isinstance(self.monitor, MonitorConfig):
            raise bad("monitor", "a MonitorConfig")
        try:  # the rules' options are checked now, not at the end of learning
            FeedMonitor("settings check", None, replace(self.monitor, interval_s=60.0))
        except (RuleError, TypeError, ValueError) as exc:
            raise ConfigError(f"feed settings: monitor: {exc}") from exc
        if not isinstance(self.counter, bool):
            raise bad("counter", "true or false")
        if self.register_size is not None and not (_is_number(self.register_size) and self.register_size > 0):
            raise bad("register_size", "a number > 0 or None")
        if not (_is_number(self.reset_drop_fraction) and 0 < self.reset_drop_fraction <= 1):
            raise bad("reset_drop_fraction", "a number in (0, 1]")
        if self.future_tolerance_s is not None and not (_is_number(self.future_tolerance_s)
                                                        and self.future_tolerance_s >= 0):
            raise bad("future_tolerance_s", "a number >= 0 (seconds) or None")
        if not (_is_number(self.level) and 0 < self.level < 1):
            raise bad("level", "a number in (0, 1)")
        if isinstance(self.incident_gap_slots, bool) or not isinstance(self.incident_gap_slots, int) \
                or self.incident_gap_slots < 0:
            raise bad("incident_gap_slots", "an integer >= 0 (grid intervals)")
        if self.timezone is not None:
            try:
                zone_info(self.timezone)
            except SpecError as exc:
                raise bad("timezone", "an IANA time zone such as 'Europe/London', or None") from exc

    def thresholds_config(self, interval_s: float) -> dict[str, Any]:
        """The part of the settings that sets the alarm limits (carried by a RefitRequest)."""
        return {"mode": self.threshold_mode, "false_alarms_per_week": float(self.false_alarms_per_week),
                "sigma_limits": dict(self.sigma_limits or {}), "budget_options": dict(self.budget_options or {}),
                "interval_s": float(interval_s)}
