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

Names are imported from the modules that define them; those modules stay
importable by their own paths too.
"""

from __future__ import annotations

from .bank import StreamBank
from .engine import Engine, FeedSettings
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
from .events import CAUTION, AlarmEvent
from .fitting import FittedModel, fit
from .innovation import Innovation
from .readings import Reading
from .rules import (
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
from .spec import ModelSpec
from .stream import Stream

__all__ = [
    # models and streaming
    "fit",
    "FittedModel",
    "ModelSpec",
    "Stream",
    "StreamBank",
    "Innovation",
    # engine, inputs and outputs
    "Engine",
    "FeedSettings",
    "Reading",
    "AlarmEvent",
    "CAUTION",
    # alarm rules (leadline.detector.rules.__all__)
    "AlarmLifecycle",
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
    "LeadlineError",
    "ConfigError",
    "DataError",
    "FitError",
    "ParameterError",
    "RejectError",
    "RuleError",
    "SchemaVersionError",
    "SourceError",
    "SpecError",
    "StateFormatError",
    "StoreError",
]
