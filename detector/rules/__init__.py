"""Alarm rules on the standardized innovations of a feed's model.

Pure code: no I/O. The public surface:

Running the rules
    :class:`FeedMonitor`, :class:`MonitorConfig` - every rule of one feed, one
    reading at a time (range check, outlier insulation, re-anchoring after a
    confirmed level shift), each reading giving a :class:`StepResult`;
    ``tick(now)`` for the stale rule; ``carry_over(old)`` after a refit.

The contract and the registry
    :class:`Rule` - what every rule does (:mod:`.contract`);
    :class:`RuleEntry`, :class:`LimitKey` - what a rule declares to the
    registry (:mod:`.registry`, the one list of rules).

Choosing limits
    :func:`budget_thresholds` - limits from a tolerable false-alarm rate per
    feed and the training residuals; :func:`sigma_thresholds` - fixed limits;
    both give :class:`AlarmLimits` (frozen; ``to_json``/``from_json``);
    :func:`validate_thresholds` - check stored limits; :func:`per_point_rate`.

The rules (each gives an :class:`Assessment` per step)
    :class:`SpikeRule`, :class:`CusumRule` (:class:`TabularCusum`, whose
    signals are :class:`CusumSignal`),
    :class:`EwmaRule` (:class:`EwmaChart`), :class:`FlatlineRule`,
    :class:`NoiseBurstRule`, :class:`StaleRule`, :class:`RangeRule`.

The alarm lifecycle
    :class:`AlarmLifecycle`, :class:`LifecycleConfig` - normal, active,
    returned to normal; on-delay, deadband, off-delay; one event per episode.

Run lengths
    :func:`cusum_arl`, :func:`ewma_arl`, :func:`shewhart_arl` - average run
    lengths on normal input (Markov chain; Brook & Evans 1972).

Every event carries :data:`leadline.detector.events.CAUTION`: the alarms are
advisory and never a safety function.
"""

from .arl import cusum_arl, ewma_arl, shewhart_arl
from .contract import LimitKey, Rule, RuleEntry
from .cusum import CusumRule, CusumSignal, TabularCusum
from .ewma import EwmaChart, EwmaRule
from .flatline import FlatlineRule
from .lifecycle import AlarmLifecycle, Assessment, LifecycleConfig
from .limits import AlarmLimits
from .monitor import FeedMonitor, MonitorConfig, StepResult
from .noise_burst import NoiseBurstRule
from .range_check import RangeRule
from .spike import SpikeRule
from .stale import StaleRule
from .thresholds import budget_thresholds, per_point_rate, sigma_thresholds, validate_thresholds

__all__ = [
    "AlarmLifecycle",
    "AlarmLimits",
    "Assessment",
    "CusumRule",
    "CusumSignal",
    "EwmaChart",
    "EwmaRule",
    "FeedMonitor",
    "FlatlineRule",
    "LifecycleConfig",
    "LimitKey",
    "MonitorConfig",
    "NoiseBurstRule",
    "RangeRule",
    "Rule",
    "RuleEntry",
    "SpikeRule",
    "StaleRule",
    "StepResult",
    "TabularCusum",
    "budget_thresholds",
    "cusum_arl",
    "ewma_arl",
    "per_point_rate",
    "shewhart_arl",
    "sigma_thresholds",
    "validate_thresholds",
]
