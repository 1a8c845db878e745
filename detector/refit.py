"""Refits: the request a feed emits, the fit run elsewhere, the limits set from it, the refit window.

The engine does not run fits. A feed emits a :class:`RefitRequest`, and
whoever drives the engine runs :func:`run_refit` (in a process pool, or
inline) and hands the result back with
:meth:`~leadline.detector.engine.Engine.install_model`.
:func:`run_refit_with_thresholds` also sets the alarm limits in the worker
(:func:`thresholds_for`). The rolling refit window of a watched feed is a
:class:`~.ring.RingBuffer` of its model values, stored as float32 departures from a
reference value (4 bytes a slot).

Refits while watching
---------------------
A refit fits the last ``refit_window_points`` slots again (the *model
values*: readings the rules insulated as outliers, or rejected as out of
range, enter as missing). It is requested

* on schedule, every ``refit_every_s`` of reading time after the end of the
  last fit window ("scheduled refit"). It keeps the chosen orders and
  calendar harmonics, so it costs one fit;
* when the diagnostics degrade ("diagnostics degraded: ..."). This reruns
  the full selection (``spec`` and ``calendar`` as configured), since the
  model no longer describes the feed.

The old model keeps watching until the new one is installed. The slots
scored in the meantime are replayed into the new stream with the old
monitor's decisions (an insulated reading stays unabsorbed). Any level
re-anchoring the old monitor did after the request is carried over.
Episodes that are open stay open, with their identity. The rules'
statistics restart, as in ``FeedMonitor.set_stream``.

The diagnostics (:mod:`.diagnostics`) only see innovations scored while
no alarm episode was open; no further diagnostics refit is requested
within ``refit_window_points`` slots of one.

The refit window
----------------
The refit window holds each absorbed reading minus the level offset that
the stream had when it scored the reading. Adding the current offset puts
the whole window on today's level, so a re-anchored level shift is not
fitted as if it were part of the process.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .durations import WEEK_S
from .fitting import FittedModel, fit
from .ring import RingBuffer  # noqa: F401  (the refit window's ring, re-exported)
from .rules import AlarmLimits, budget_thresholds, sigma_thresholds
from .rules.thresholds import with_training_readings
from .rules.drift import complete_section, drift_options
from .seasonality import CalendarTerms
from .spec import ModelSpec


@dataclass(frozen=True, eq=False)
class RefitRequest:
    """A fit to run elsewhere (:func:`run_refit`); picklable.

    Attributes
    ----------
    feed_id : str
    values : ndarray
        The window on the feed's grid, NaN for missing slots.
    epoch_s : ndarray
        The slots' times, epoch seconds.
    spec : ModelSpec or "auto"
    calendar : CalendarTerms or None
    reason : str
        ``"initial fit"``, ``"scheduled refit"`` or ``"diagnostics degraded: ..."``.
    seasonal_period : int or None
        With "auto": a short seasonal period also tried.
    interval_s : float
        The grid's interval.
    thresholds_config : dict
        How the alarm limits are set from the fit (see :func:`thresholds_for`).
    request_id : int
        Sequence number of the feed's requests.
    timezone : str or None
        IANA time zone of the cycles "auto" looks for (the feed's setting).
    """

    feed_id: str
    values: np.ndarray
    epoch_s: np.ndarray
    spec: ModelSpec | str
    calendar: CalendarTerms | None
    reason: str
    seasonal_period: int | None = None
    interval_s: float = math.nan
    thresholds_config: dict[str, Any] = field(default_factory=dict)
    request_id: int = 0
    timezone: str | None = None


def run_refit(request: RefitRequest) -> FittedModel:
    """Fit a request's window (top-level and picklable, for a process pool).

    Raises
    ------
    FitError
        When statsmodels cannot fit the window at all; hand the message to
        :meth:`~leadline.detector.engine.Engine.refit_failed`.
    """
    calendar = request.calendar
    wants_times = calendar is not None or request.spec == "auto"  # "auto" looks for daily/weekly cycles
    return fit(request.values, request.spec, calendar=calendar,
               timestamps_epoch_s=request.epoch_s if wants_times else None,
               seasonal_period=request.seasonal_period,
               timezone=calendar.timezone if calendar is not None else request.timezone)


def thresholds_for(fitted: FittedModel, request: RefitRequest) -> AlarmLimits:
    """The alarm limits for a fit: budget mode from its standardized residuals, or sigma mode."""
    return thresholds_from_config(fitted, request.values, request.interval_s, request.thresholds_config)


def thresholds_from_config(fitted: FittedModel, values: np.ndarray, interval_s: float,
                           config: dict[str, Any]) -> AlarmLimits:
    """The alarm limits for a fit of ``values`` on a grid of ``interval_s``.

    Parameters
    ----------
    fitted : FittedModel
    values : ndarray
        The fitted window (NaN for missing slots); the flatline rule's
        resolution and repeat habits are learnt from its readings.
    interval_s : float
    config : dict
        ``mode`` (``"budget"`` or ``"sigma"``); the drift rule is switched
        on for a model with differencing (:func:`~.rules.drift.drift_options`), ``false_alarms_per_week``
        (budget mode), and optionally ``sigma_limits`` and ``budget_options``
        (:meth:`~leadline.detector.feed_settings.FeedSettings.thresholds_config`).
    """
    values = np.asarray(values, dtype=float)  # missing slots stay NaN: they break runs of repeats
    if config.get("mode") == "sigma":
        limits = with_training_readings(sigma_thresholds(**drift_options(config.get("sigma_limits"), fitted.spec)),
                                        values)
    else:
        limits = budget_thresholds(fitted.standardized_residuals, interval_s=interval_s,
                                   false_alarms=config["false_alarms_per_week"], per_s=WEEK_S,
                                   values=values, **drift_options(config.get("budget_options"), fitted.spec))
    # the drift rule needs the model itself (only for d + D >= 1): :mod:`.rules.drift`
    return with_drift(limits, fitted.spec, fitted.system)


def with_drift(limits: AlarmLimits, spec: ModelSpec, system: Any, seed: int = 0) -> AlarmLimits:
    """``limits`` with the drift section completed for this model (:func:`~.rules.drift.complete_section`)."""
    data = limits.to_json()
    data["drift"] = complete_section(data.get("drift"), spec, system, seed)
    return AlarmLimits.from_json(data)


def run_refit_with_thresholds(request: RefitRequest) -> tuple[FittedModel, dict[str, Any]]:
    """:func:`run_refit` and :func:`thresholds_for` in one call, so both run in the worker.

    The limits come in their JSON form (as stored with the model). Pass them
    to :meth:`~leadline.detector.engine.Engine.install_model` (``thresholds=``);
    budget limits take a few tenths of a second per feed, which the service
    loop should not spend.
    """
    fitted = run_refit(request)
    return fitted, thresholds_for(fitted, request).to_json()
