"""leadline's numeric core: fit a model per feed, continue it one reading at a time, score the innovations.

Pure code: no I/O, and nothing from paho, sqlalchemy or ``leadline.adapters``
(a test guards this). The public surface:

Models
    :func:`fit` - a statsmodels SARIMAX fit of a :class:`ModelSpec` (or
    ``"auto"``) giving a frozen :class:`FittedModel`.

Streaming
    :class:`Stream` - one feed's model continued by the exact Kalman step;
    each step gives an :class:`Innovation`. :class:`StreamBank` - many
    streams stepped together.

The engine
    :class:`Engine` with its per-feed :class:`FeedSettings` - readings
    (:class:`Reading`) and clock ticks in, :class:`AlarmEvent` out. Every
    event carries :data:`CAUTION`: the alarms are advisory and never a
    safety function.

Alarm rules
    The public names of :mod:`leadline.detector.rules`, re-exported here
    (:class:`FeedMonitor`, :class:`MonitorConfig`, the rules, the lifecycle,
    threshold choice and run lengths).

Errors
    Every class of :mod:`leadline.detector.errors`, rooted at
    :class:`LeadlineError`.

Names are loaded from the modules that define them on first use (PEP 562
module ``__getattr__``), so that importing one light module such as
``leadline.detector.events`` or ``leadline.detector.errors`` does not load
statsmodels, scipy and pandas; those modules stay importable by their own
paths too. The error classes are loaded at once (they are light).
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

from .errors import (
    ConfigError,
    DataError,
    FitError,
    LeadlineError,
    ParameterError,
    RejectError,
    RuleError,
    SchemaVersionError,
    SourceError,
    SpecError,
    StateFormatError,
    StoreError,
)

if TYPE_CHECKING:  # for type checkers and editors; at run time see __getattr__
    from .bank import StreamBank
    from .engine import Engine, FeedSettings
    from .events import AlarmEvent, CAUTION
    from .fitting import fit, FittedModel
    from .innovation import Innovation
    from .readings import Reading
    from .spec import ModelSpec
    from .stream import Stream
    from .rules import (
        AlarmLimits,
        LimitKey,
        Rule,
        RuleEntry,
        StepResult,
        AlarmLifecycle,
        Assessment,
        CusumRule,
        CusumSignal,
        EwmaChart,
        EwmaRule,
        FeedMonitor,
        FlatlineRule,
        LifecycleConfig,
        MonitorConfig,
        NoiseBurstRule,
        RangeRule,
        SpikeRule,
        StaleRule,
        TabularCusum,
        budget_thresholds,
        cusum_arl,
        ewma_arl,
        per_point_rate,
        shewhart_arl,
        sigma_thresholds,
        validate_thresholds,
    )

#: Where each lazily loaded public name is defined (relative to this package).
_LAZY = {
    "fit": ".fitting",
    "FittedModel": ".fitting",
    "ModelSpec": ".spec",
    "Stream": ".stream",
    "StreamBank": ".bank",
    "Innovation": ".innovation",
    "Engine": ".engine",
    "FeedSettings": ".engine",
    "Reading": ".readings",
    "AlarmEvent": ".events",
    "CAUTION": ".events",
    "AlarmLimits": ".rules",
    "LimitKey": ".rules",
    "Rule": ".rules",
    "RuleEntry": ".rules",
    "StepResult": ".rules",
    "AlarmLifecycle": ".rules",
    "Assessment": ".rules",
    "CusumRule": ".rules",
    "CusumSignal": ".rules",
    "EwmaChart": ".rules",
    "EwmaRule": ".rules",
    "FeedMonitor": ".rules",
    "FlatlineRule": ".rules",
    "LifecycleConfig": ".rules",
    "MonitorConfig": ".rules",
    "NoiseBurstRule": ".rules",
    "RangeRule": ".rules",
    "SpikeRule": ".rules",
    "StaleRule": ".rules",
    "TabularCusum": ".rules",
    "budget_thresholds": ".rules",
    "cusum_arl": ".rules",
    "ewma_arl": ".rules",
    "per_point_rate": ".rules",
    "shewhart_arl": ".rules",
    "sigma_thresholds": ".rules",
    "validate_thresholds": ".rules",
}

__all__ = [
    # models and streaming, the engine, its inputs and outputs
    "fit",
    "FittedModel",
    "ModelSpec",
    "Stream",
    "StreamBank",
    "Innovation",
    "Engine",
    "FeedSettings",
    "Reading",
    "AlarmEvent",
    "CAUTION",
    # alarm rules (leadline.detector.rules.__all__)
    "AlarmLifecycle",
    "AlarmLimits",
    "LimitKey",
    "Rule",
    "RuleEntry",
    "StepResult",
    "Assessment",
    "CusumRule",
    "CusumSignal",
    "EwmaChart",
    "EwmaRule",
    "FeedMonitor",
    "FlatlineRule",
    "LifecycleConfig",
    "MonitorConfig",
    "NoiseBurstRule",
    "RangeRule",
    "SpikeRule",
    "StaleRule",
    "TabularCusum",
    "budget_thresholds",
    "cusum_arl",
    "ewma_arl",
    "per_point_rate",
    "shewhart_arl",
    "sigma_thresholds",
    "validate_thresholds",
    # errors (leadline.detector.errors)
    "ConfigError",
    "DataError",
    "FitError",
    "LeadlineError",
    "ParameterError",
    "RejectError",
    "RuleError",
    "SchemaVersionError",
    "SourceError",
    "SpecError",
    "StateFormatError",
    "StoreError",
]


def __getattr__(name: str) -> Any:
    """Load a public name from its defining module on first use, then keep it."""
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(module, __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
