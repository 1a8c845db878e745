"""The engine: readings and clock ticks in; events, state changes and refit requests out.

The engine is pure: it does no I/O and never reads the clock. Time comes from
the readings' timestamps and from :meth:`Engine.tick`. The live service, a
replay of history and the tests therefore drive it identically. Fits are
not run here. The engine emits a :class:`RefitRequest`, and whoever drives it
runs :func:`run_refit` (in a process pool, or inline) and hands the result
back with :meth:`Engine.install_model`.

Lifecycle of one feed
---------------------
``learning``
    Readings are collected until the training window is full:
    ``train_points`` readings or ``train_span_s`` seconds, whichever comes
    first, and never fewer than ``min_train_points``. The window is then
    put on a regular grid (:class:`~leadline.detector.grid.GridCursor`
    rules; the interval is ``interval_s`` or the median spacing, and the
    grid's phase is the median phase of the timestamps).
``fitting``
    A :class:`RefitRequest` ("initial fit") has been emitted. Readings keep
    arriving and are placed on the grid and buffered. :meth:`Engine.install_model`
    builds the stream, sets the alarm limits and replays the buffered slots
    through the rules, so the stream ends up at the latest slot. A failed fit
    (:meth:`Engine.refit_failed`) goes back to ``learning``, and the fit is
    tried again after ``min_train_points`` more readings.
``watching``
    Every slot is scored by :class:`~leadline.detector.rules.FeedMonitor`.
    A slot with no reading is fed as NaN (predict only), with the slot's
    time. A late, duplicate or off-grid reading is counted and dropped by the
    grid rules. A reading more than ``future_tolerance_s`` ahead of the last
    :meth:`Engine.tick` is counted as ``future`` and dropped.

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

Diagnostics
-----------
Every :data:`DIAGNOSTICS_EVERY` scored slots, the last
:data:`DIAGNOSTICS_WINDOW` absorbed innovations, winsorized at
+-:data:`DIAGNOSTICS_CLIP_ABS_Z`, are checked two ways (Notes). The window
only holds innovations scored while no alarm episode was open: an open
episode, or a re-anchoring of the level, empties it. A rule already
explains such a misfit, and a refit on faulty data would teach the model
the fault. (With the alarmed slots left in, a confirmed level shift made
the Ljung-Box check fire in two of three seeded test feeds.) No further
diagnostics refit is requested within ``refit_window_points`` slots of one.

The refit window holds each absorbed reading minus the level offset that
the stream had when it scored the reading. Adding the current offset puts
the whole window on today's level, so a re-anchored level shift is not
fitted as if it were part of the process.

Checkpoints
-----------
:meth:`Engine.checkpoint` saves a watched feed whole (:mod:`.feed_state`):
the stream, the grid cursor, the counter, the alarm limits, the refit
window and every rule's running state. After :meth:`Engine.restore`, the
feed scores the next slot exactly as it would have without the restart.
A refit that was in flight is requested again at the next slot. When the
rule settings changed in between, the rules restart, and the episodes that
were open are closed, with a note in their detail. A feed that is still
learning has no checkpoint; after a restart it learns again.

Use one engine from one thread. Every output (of ``process``, ``tick``,
``install_model`` and ``refit_failed``) may hold events, state changes
and refit requests.

Counter feeds
-------------
Register readings become interval deltas (:mod:`.counters`). A meter reset
or replacement is reported as its own event (rule ``meter_reset``, severity
``warning``, opened and closed at the reading), and its slot is missing.
The engineering range applies to the deltas.

Notes
-----
The variance check is the mean of the winsorized squared innovations,
divided by its expectation under the model. With c the clip level and z
standard normal:

.. math::

    E[\\min(z^2, c^2)] = (2\\Phi(c) - 1) - 2c\\varphi(c) + 2c^2(1 - \\Phi(c))

It triggers above :data:`VARIANCE_RATIO_LIMIT`, an innovation spread about
1.4 times the model's. With 240 values the ratio has a standard error
of about 0.09 under the model, so 2.0 lies more than 10 standard errors out.

The autocorrelation check is the Ljung-Box statistic of the window (Ljung
& Box 1978, Biometrika 65) at m = :data:`LJUNG_BOX_LAG` lags:

.. math::

    Q = n(n+2)\\sum_{j=1}^{m}\\frac{r_j^2}{n-j} \\sim \\chi^2_m

It triggers at p < :data:`LJUNG_BOX_ALPHA`. The window length and the
limits are common practice, not published values.
"""

from __future__ import annotations

import dataclasses
import inspect
import json
import math
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from typing import Any

import numpy as np
from scipy.stats import chi2, norm

from .counters import CounterDeltas, CounterStep
from .errors import ConfigError, DataError, RuleError, SpecError, StateFormatError
from .events import AlarmEvent
from .feed_state import (decode_time, encode_time, pack, restore_monitor, saved_open_events, snapshot_monitor,
                         unpack)
from .fitting import FittedModel, fit
from .grid import GridCounts, GridCursor, infer_interval_s
from .innovation import Innovation
from .readings import Reading
from .rules import FeedMonitor, MonitorConfig, budget_thresholds, per_point_rate, sigma_thresholds
from .seasonality import CalendarTerms, zone_info
from .spec import ModelSpec
from .stream import Stream

WEEK_S = 7 * 86400.0
STATES = ("learning", "fitting", "watching")

#: Absorbed innovations in the rolling diagnostics window.
DIAGNOSTICS_WINDOW = 240
#: Scored slots between two diagnostics checks.
DIAGNOSTICS_EVERY = 48
#: The innovations are winsorized at +-this for the diagnostics.
DIAGNOSTICS_CLIP_ABS_Z = 4.0
#: Winsorized mean square over its expectation above which the fit is degraded.
VARIANCE_RATIO_LIMIT = 2.0
LJUNG_BOX_LAG = 10
#: Ljung-Box p-value below which the innovations are taken as autocorrelated.
LJUNG_BOX_ALPHA = 1e-4

_BUDGET_RESERVED = {"residuals", "interval_s", "false_alarms", "per_s", "values"}


# ======================================================================= types
@dataclass(frozen=True)
class StateChange:
    """A feed moved between lifecycle states (``old == new`` for a model swap or a failed refit).

    ``old`` is ``"new"`` for a feed's first reading and for a restore.
    ``at`` is reading time (the slot that caused it), UTC.
    """

    feed_id: str
    old: str
    new: str
    at: datetime
    detail: str


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


@dataclass
class EngineOutput:
    """What one call of the engine produced.

    Attributes
    ----------
    events : list of AlarmEvent
        Onsets and clearings (store them; the store upserts on their key).
    state_changes : list of StateChange
    refit_requests : list of RefitRequest
    innovations : list of (feed_id, Innovation)
        Every slot scored, in order (a NaN slot included), for display and replay tools.
    """

    events: list[AlarmEvent] = field(default_factory=list)
    state_changes: list[StateChange] = field(default_factory=list)
    refit_requests: list[RefitRequest] = field(default_factory=list)
    innovations: list[tuple[str, Innovation]] = field(default_factory=list)

    def extend(self, other: "EngineOutput") -> "EngineOutput":
        """Append ``other``'s items to this output; returns self."""
        self.events.extend(other.events)
        self.state_changes.extend(other.state_changes)
        self.refit_requests.extend(other.refit_requests)
        self.innovations.extend(other.innovations)
        return self

    @property
    def is_empty(self) -> bool:
        return not (self.events or self.state_changes or self.refit_requests or self.innovations)


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
        Request a refit when the diagnostics degrade (module Notes).
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
    false_alarms_per_week: float = 1.0
    sigma_limits: dict[str, Any] | None = None
    budget_options: dict[str, Any] | None = None
    monitor: MonitorConfig = field(default_factory=MonitorConfig)
    counter: bool = False
    register_size: float | None = None
    reset_drop_fraction: float = 0.5
    future_tolerance_s: float | None = 3600.0
    level: float = 0.95
    timezone: str | None = None

    def __post_init__(self) -> None:
        def bad(key: str, expected: str) -> ConfigError:
            return ConfigError(f"feed settings: {key} must be {expected}, got {getattr(self, key)!r}")

        if not (isinstance(self.spec, ModelSpec) or self.spec == "auto"):
            raise bad("spec", "a ModelSpec or 'auto'")
        if self.calendar is not None and not isinstance(self.calendar, CalendarTerms):
            raise bad("calendar", "CalendarTerms or None")
        if self.timezone is not None:
            try:
                zone_info(self.timezone)
            except SpecError as exc:
                raise bad("timezone", "an IANA time zone such as 'Europe/London', or None") from exc
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

    def thresholds_config(self, interval_s: float) -> dict[str, Any]:
        """The part of the settings that sets the alarm limits (carried by a RefitRequest)."""
        return {"mode": self.threshold_mode, "false_alarms_per_week": float(self.false_alarms_per_week),
                "sigma_limits": dict(self.sigma_limits or {}), "budget_options": dict(self.budget_options or {}),
                "interval_s": float(interval_s)}


# ============================================================ fits elsewhere
def run_refit(request: RefitRequest) -> FittedModel:
    """Fit a request's window (top-level and picklable, for a process pool).

    Raises
    ------
    FitError
        When statsmodels cannot fit the window at all; hand the message to
        :meth:`Engine.refit_failed`.
    """
    calendar = request.calendar
    wants_times = calendar is not None or request.spec == "auto"  # "auto" looks for daily/weekly cycles
    return fit(request.values, request.spec, calendar=calendar,
               timestamps_epoch_s=request.epoch_s if wants_times else None,
               seasonal_period=request.seasonal_period,
               timezone=calendar.timezone if calendar is not None else request.timezone)


def thresholds_for(fitted: FittedModel, request: RefitRequest) -> dict[str, Any]:
    """The alarm limits for a fit: budget mode from its standardized residuals, or sigma mode."""
    config = request.thresholds_config
    if config.get("mode") == "sigma":
        return sigma_thresholds(**config.get("sigma_limits", {}))
    values = np.asarray(request.values, dtype=float)
    return budget_thresholds(fitted.standardized_residuals, interval_s=request.interval_s,
                             false_alarms=config["false_alarms_per_week"], per_s=WEEK_S,
                             values=values[np.isfinite(values)], **config.get("budget_options", {}))


def run_refit_with_thresholds(request: RefitRequest) -> tuple[FittedModel, dict[str, Any]]:
    """:func:`run_refit` and :func:`thresholds_for` in one call, so both run in the worker.

    Pass the limits to :meth:`Engine.install_model` (``thresholds=``); budget
    limits take a few tenths of a second per feed, which the service loop
    should not spend.
    """
    fitted = run_refit(request)
    return fitted, thresholds_for(fitted, request)


# ================================================================ diagnostics
def clipped_square_mean(clip_abs_z: float) -> float:
    """E[min(z^2, c^2)] for z ~ N(0, 1) (see the module Notes)."""
    c = float(clip_abs_z)
    return (2 * norm.cdf(c) - 1) - 2 * c * norm.pdf(c) + 2 * c * c * norm.sf(c)


def ljung_box_pvalue(x: np.ndarray, lag: int) -> float:
    """The Ljung-Box p-value of ``x`` at ``lag`` lags, chi-square with ``lag`` df (module Notes)."""
    x = np.asarray(x, dtype=float)
    n = x.size
    d = x - x.mean()
    denom = float(d @ d)
    if n <= lag + 1 or denom <= 0:
        return math.nan
    r = np.array([float(d[j:] @ d[:-j]) / denom for j in range(1, lag + 1)])
    q = n * (n + 2) * float(np.sum(r * r / (n - np.arange(1, lag + 1))))
    return float(chi2.sf(q, lag))


class InnovationDiagnostics:
    """Rolling checks of a watched feed's innovations (module Notes)."""

    def __init__(self) -> None:
        self.z: deque[float] = deque(maxlen=DIAGNOSTICS_WINDOW)
        self.since_check = 0
        self.last: dict[str, float] | None = None
        self._expected = clipped_square_mean(DIAGNOSTICS_CLIP_ABS_Z)

    def add(self, inn: Innovation) -> None:
        z = inn.z
        if inn.absorbed and math.isfinite(z):
            c = DIAGNOSTICS_CLIP_ABS_Z
            self.z.append(c if z > c else (-c if z < -c else z))
            self.since_check += 1

    @property
    def due(self) -> bool:
        return len(self.z) >= DIAGNOSTICS_WINDOW and self.since_check >= DIAGNOSTICS_EVERY

    def skip(self) -> None:
        self.since_check = 0

    def check(self) -> str | None:
        """Judge the window now; a one-line reason when the fit has degraded, else None."""
        self.since_check = 0
        z = np.fromiter(self.z, dtype=float)
        ratio = float(np.mean(z * z)) / self._expected
        p = ljung_box_pvalue(z, LJUNG_BOX_LAG)
        self.last = {"variance_ratio": float(ratio), "ljung_box_p": float(p)}
        if ratio > VARIANCE_RATIO_LIMIT:
            return (f"innovation variance {ratio:.2f} times the model's over the last {z.size} readings "
                    f"(limit {VARIANCE_RATIO_LIMIT:g})")
        if math.isfinite(p) and p < LJUNG_BOX_ALPHA:
            return (f"innovations autocorrelated over the last {z.size} readings "
                    f"(Ljung-Box p = {p:.2g} at lag {LJUNG_BOX_LAG})")
        return None

    def reset(self) -> None:
        self.z.clear()
        self.since_check = 0


# =================================================================== one feed
class RingBuffer:
    """The last ``capacity`` floats, in a fixed numpy array (8 bytes a value)."""

    def __init__(self, capacity: int, values: Any = ()) -> None:
        self._data = np.full(int(capacity), np.nan)
        first = np.asarray(values, dtype=float).ravel()[-self._data.size:]
        self._data[:first.size] = first
        self._start = 0
        self._len = int(first.size)

    def __len__(self) -> int:
        return self._len

    def append(self, value: float) -> None:
        cap = self._data.size
        if self._len < cap:
            self._data[(self._start + self._len) % cap] = value
            self._len += 1
        else:
            self._data[self._start] = value
            self._start = (self._start + 1) % cap

    def to_array(self) -> np.ndarray:
        """The values, oldest first (a copy)."""
        end = self._start + self._len
        if end <= self._data.size:
            return self._data[self._start:end].copy()
        return np.concatenate((self._data[self._start:], self._data[:end - self._data.size]))

    def add(self, constant: float) -> None:
        """Add ``constant`` to every value (NaN stays NaN)."""
        self._data += constant


def _utc(epoch_s: float) -> datetime:
    return datetime.fromtimestamp(float(epoch_s), tz=timezone.utc)


def _fingerprint(config: MonitorConfig) -> str:
    return json.dumps(dataclasses.asdict(config), sort_keys=True, default=repr)


def _grid_origin(epochs: np.ndarray, interval_s: float) -> float:
    """The earliest time, moved to the median phase of all timestamps on the grid."""
    t0 = float(epochs.min())
    phase = np.mod(epochs - t0 + interval_s / 2.0, interval_s) - interval_s / 2.0
    return t0 + float(np.median(phase))


@dataclass
class _Pending:
    kind: str  # "initial" or "refit"
    request: RefitRequest
    window_end_slot: int
    buffer: list = field(default_factory=list)
    offset_at_request: float = 0.0
    last_seen: datetime | None = None
    full_selection: bool = True


class _Feed:
    """The lifecycle of one feed (see the module docstring)."""

    def __init__(self, feed_id: str, settings: FeedSettings) -> None:
        if not isinstance(settings, FeedSettings):
            raise ConfigError(f"feed {feed_id!r}: settings_for must return FeedSettings, "
                              f"got {type(settings).__name__}")
        self.feed_id = feed_id
        self.settings = settings
        self.state = "learning"
        self.cursor: GridCursor | None = None
        self.counter = (CounterDeltas(settings.register_size, settings.reset_drop_fraction)
                        if settings.counter else None)
        self.raw: list[tuple[float, float, datetime]] = []
        self.raw_real = 0
        self.raw_span = (math.inf, -math.inf)
        self.window: list[float] = []
        self.window_start = 0
        self.window_valid = 0
        self.next_learning_check = settings.min_train_points
        self._replaying_raw = False
        self.next_slot = 0
        self.history = RingBuffer(settings.refit_window_points)
        self.pending: _Pending | None = None
        self.monitor: FeedMonitor | None = None
        self.thresholds: dict[str, Any] | None = None
        self.thresholds_config: dict[str, Any] | None = None
        self.model_version: int | None = None
        self.model_label: str | None = None
        self.model_reason: str | None = None
        self.fitted_at: datetime | None = None
        self.fitted_spec: ModelSpec | None = None
        self.fitted_calendar: CalendarTerms | None = None
        self.fit_problems: list[str] = []
        self.next_refit_epoch_s: float | None = None
        self.diagnostics = InnovationDiagnostics()
        self.last_diag_refit_slot: int | None = None
        self.refit_due: tuple[str, bool] | None = None
        self.last_refit_error: str | None = None
        self.request_seq = 0
        self.readings = 0
        self.rejects = {"future": 0, "non_finite": 0}
        self.last_time: datetime | None = None
        self.last_value = math.nan
        self.last_seen: datetime | None = None
        self.meter_resets = 0

    # ------------------------------------------------------------- helpers
    def slot_epoch(self, slot: int) -> float:
        return self.cursor.slot_time(slot)

    def _has_range(self) -> bool:
        m = self.settings.monitor
        return m.range_low is not None or m.range_high is not None

    def _monitor_config(self, thresholds: dict[str, Any]) -> MonitorConfig:
        return replace(self.settings.monitor, thresholds=thresholds, interval_s=self.cursor.interval_s)

    def _at_last_slot(self) -> datetime:
        return _utc(self.slot_epoch(max(self.next_slot - 1, 0)))

    # -------------------------------------------------------------- readings
    def process(self, reading: Reading, clock: datetime | None) -> EngineOutput:
        out = EngineOutput()
        self.readings += 1
        ts = reading.timestamp
        epoch = ts.timestamp()
        tolerance = self.settings.future_tolerance_s
        if clock is not None and tolerance is not None and epoch - clock.timestamp() > tolerance:
            self.rejects["future"] += 1
            return out
        value = float(reading.value)
        if math.isinf(value) and (self.counter is not None or not self._has_range()):
            # an infinite reading can only be judged by the range rule; without one the slot is missing
            self.rejects["non_finite"] += 1
            value = math.nan
        if self.cursor is None:
            self._learn_raw(epoch, value, ts, out)
        else:
            self._place(epoch, value, ts, out)
        return out

    def tick(self, now: datetime) -> EngineOutput:
        out = EngineOutput()
        if self.state == "watching" and self.monitor is not None:
            out.events.extend(self.monitor.tick(now))
        return out

    def _learn_raw(self, epoch: float, value: float, ts: datetime, out: EngineOutput) -> None:
        """Before the grid exists: keep the reading; put the window on a grid once it is full."""
        self.raw.append((epoch, value, ts))
        self.last_time, self.last_value = ts, value
        if math.isfinite(value):
            self.raw_real += 1
        self.raw_span = (min(self.raw_span[0], epoch), max(self.raw_span[1], epoch))
        s = self.settings
        if self.raw_real < self.next_learning_check:
            return
        if not (self.raw_real >= s.train_points or self.raw_span[1] - self.raw_span[0] >= s.train_span_s):
            return
        epochs = np.fromiter((r[0] for r in self.raw), dtype=float, count=len(self.raw))
        distinct = np.unique(epochs)
        if distinct.size < 2:
            self.next_learning_check = self.raw_real + 1
            return
        interval = s.interval_s if s.interval_s is not None else infer_interval_s(distinct)
        self.cursor = GridCursor(_grid_origin(epochs, interval), interval, s.grid_tolerance)
        raw, self.raw = self.raw, []
        self._replaying_raw = True
        try:
            for i in sorted(range(len(raw)), key=lambda k: raw[k][0]):
                self._place(*raw[i], out)
        finally:
            self._replaying_raw = False
        self.last_time, self.last_value = ts, value  # the latest arrival, not the latest in time
        self._maybe_end_learning(out)

    def _place(self, epoch: float, value: float, ts: datetime, out: EngineOutput) -> None:
        """Put one reading on the grid; missing slots before it become NaN steps."""
        slot = self.cursor.place(epoch)
        if slot is None:
            return
        if not self._replaying_raw:
            self.last_time, self.last_value = ts, value
        for s in range(self.next_slot, slot):
            self._slot(math.nan, _utc(self.slot_epoch(s)), out)
        if not math.isnan(value):
            self.last_seen = ts
        if self.counter is not None:
            step = self.counter.step(slot, value)
            if step.kind == "reset":
                self.meter_resets += 1
                out.events.append(self._reset_event(step, ts))
            value = step.delta
        self._slot(value, ts, out)

    def _reset_event(self, step: CounterStep, ts: datetime) -> AlarmEvent:
        c = self.counter
        size = f"a {c.register_size:g} register" if c.register_size else "a register with no rollover size"
        detail = (f"register went from {step.previous:.10g} to {step.reading:.10g}, a drop of more than "
                  f"{c.reset_drop_fraction:g} of the last reading and no rollover of {size}: meter reset or "
                  "replacement; this interval's delta is not scored")
        return AlarmEvent(feed_id=self.feed_id, rule="meter_reset", severity="warning", start=ts, end=ts,
                          value_at_onset=step.reading,
                          parameters={**c.parameters(), "previous_reading": step.previous},
                          model_version=self.model_version, detail=detail)

    def _slot(self, value: float, ts: datetime, out: EngineOutput) -> None:
        """Hand the next slot's value to the lifecycle state."""
        slot = self.next_slot
        self.next_slot += 1
        if self.state == "learning":
            self.window.append(value)
            if math.isfinite(value):
                self.window_valid += 1
            if not self._replaying_raw:
                self._maybe_end_learning(out)
        elif self.state == "fitting":
            self.pending.buffer.append((value, ts))
        else:
            self._watch(value, ts, slot, out)

    def _watch(self, value: float, ts: datetime, slot: int, out: EngineOutput) -> None:
        monitor = self.monitor
        reanchors = monitor.reanchors
        out.events.extend(monitor.process(value, ts))
        inn = monitor.last_innovation
        out.innovations.append((self.feed_id, inn))
        # the refit window holds readings on the current model's base level (see _request_refit)
        model_value = inn.value - monitor.stream.level_offset if inn.absorbed else math.nan
        self.history.append(model_value)
        if self.pending is not None:
            self.pending.buffer.append(model_value)
        if monitor.reanchors != reanchors or any(life.is_active for life in monitor.lifecycles.values()):
            self.diagnostics.reset()  # a fault the rules already report is not a misfit of the model
        else:
            self.diagnostics.add(inn)
        self._maybe_refit(slot, out)

    # ------------------------------------------------------------- learning
    def _maybe_end_learning(self, out: EngineOutput) -> None:
        s = self.settings
        if self.window_valid < self.next_learning_check:
            return
        span_s = len(self.window) * self.cursor.interval_s
        if self.window_valid < s.train_points and span_s < s.train_span_s:
            return
        self._request_initial(out)

    def _make_request(self, values: np.ndarray, start_slot: int, reason: str, spec: Any,
                      calendar: CalendarTerms | None) -> RefitRequest:
        interval = self.cursor.interval_s
        if self.settings.threshold_mode == "budget":
            try:
                per_point_rate(self.settings.false_alarms_per_week, WEEK_S, interval)
            except RuleError as exc:
                raise ConfigError(f"feed {self.feed_id!r}: false_alarms_per_week: {exc}") from exc
        epoch = self.cursor.origin_epoch_s + interval * np.arange(start_slot, start_slot + values.size, dtype=float)
        self.request_seq += 1
        return RefitRequest(feed_id=self.feed_id, values=values, epoch_s=epoch, spec=spec, calendar=calendar,
                            reason=reason, seasonal_period=self.settings.seasonal_period, interval_s=interval,
                            thresholds_config=self.settings.thresholds_config(interval),
                            request_id=self.request_seq, timezone=self.settings.timezone)

    def _request_initial(self, out: EngineOutput) -> None:
        values = np.array(self.window, dtype=float)
        request = self._make_request(values, self.window_start, "initial fit", self.settings.spec,
                                     self.settings.calendar)
        self.pending = _Pending("initial", request, self.next_slot, last_seen=self.last_seen)
        self.state = "fitting"
        at = self._at_last_slot()
        first = _utc(request.epoch_s[0])
        out.state_changes.append(StateChange(
            self.feed_id, "learning", "fitting", at,
            f"training window full: {self.window_valid} readings in {values.size} slots of "
            f"{self.cursor.interval_s:g} s from {first.isoformat()} to {at.isoformat()}; initial fit requested"))
        out.refit_requests.append(request)

    # ---------------------------------------------------------------- refits
    def _maybe_refit(self, slot: int, out: EngineOutput) -> None:
        if self.pending is not None:
            return
        if self.refit_due is not None:
            reason, full = self.refit_due
            self.refit_due = None
            self._request_refit(reason, full, out)
            return
        every = self.settings.refit_every_s
        if every is not None and self.next_refit_epoch_s is not None \
                and self.slot_epoch(slot) >= self.next_refit_epoch_s:
            self._request_refit("scheduled refit", False, out)
            return
        if self.settings.diagnostics_refit and self.diagnostics.due:
            if self.last_diag_refit_slot is not None \
                    and slot - self.last_diag_refit_slot < self.settings.refit_window_points:
                self.diagnostics.skip()
                return
            verdict = self.diagnostics.check()
            if verdict is not None:
                self.last_diag_refit_slot = slot
                self._request_refit(f"diagnostics degraded: {verdict}", True, out)

    def _request_refit(self, reason: str, full_selection: bool, out: EngineOutput) -> None:
        """Request a fit of the rolling window.

        The history holds each absorbed reading minus the level offset the
        stream had when it scored it (NaN for a reading not absorbed), so
        adding today's offset puts the whole window on the current level:
        a level shift the rules confirmed and re-anchored is not fitted
        as part of the process.
        """
        base = self.monitor.stream.level_offset
        values = self.history.to_array() + base
        valid = int(np.isfinite(values).sum())
        s = self.settings
        if valid < s.min_train_points:
            self.last_refit_error = (f"{reason} postponed: {valid} usable readings in the window, "
                                     f"{s.min_train_points} needed")
            if s.refit_every_s is not None:
                self.next_refit_epoch_s = self.slot_epoch(self.next_slot - 1) + s.refit_every_s
            return
        if full_selection or self.fitted_spec is None:
            spec, calendar = s.spec, s.calendar
        else:
            spec, calendar = self.fitted_spec, self.fitted_calendar
        request = self._make_request(values, self.next_slot - values.size, reason, spec, calendar)
        self.pending = _Pending("refit", request, self.next_slot, offset_at_request=base,
                                full_selection=full_selection)
        out.refit_requests.append(request)

    def install(self, fitted: FittedModel, model_version: int, reason: str,
                thresholds: dict[str, Any] | None, request: RefitRequest | None) -> EngineOutput:
        p = self.pending
        if p is None:
            raise DataError(f"feed {self.feed_id!r}: no refit is pending; install_model answers a RefitRequest")
        if request is not None and request.request_id != p.request.request_id:
            raise DataError(f"feed {self.feed_id!r}: the model answers request {request.request_id}, "
                            f"but request {p.request.request_id} is pending")
        if not isinstance(fitted, FittedModel):
            raise DataError(f"feed {self.feed_id!r}: install_model needs a FittedModel, got {type(fitted).__name__}")
        if fitted.nobs != p.request.values.size:
            raise DataError(f"feed {self.feed_id!r}: the model was fitted on {fitted.nobs} slots, "
                            f"the pending request has {p.request.values.size}")
        if isinstance(model_version, bool) or not isinstance(model_version, int):
            raise DataError(f"feed {self.feed_id!r}: model_version must be an integer, got {model_version!r}")
        th = thresholds if thresholds is not None else thresholds_for(fitted, p.request)
        stream = fitted.stream(level=self.settings.level, model_version=model_version)
        config = self._monitor_config(th)
        out = EngineOutput()
        old_version, old_label = self.model_version, self.model_label
        self.pending = None
        self.thresholds = th
        self.thresholds_config = p.request.thresholds_config
        self.model_version = model_version
        self.model_label = fitted.spec.label + (" + calendar terms" if fitted.calendar is not None else "")
        self.model_reason = reason
        self.fitted_at = _utc(p.request.epoch_s[-1])
        self.fitted_spec = fitted.spec
        self.fitted_calendar = fitted.calendar
        self.fit_problems = list(fitted.problems)
        self.last_refit_error = None
        every = self.settings.refit_every_s
        self.next_refit_epoch_s = None if every is None else float(p.request.epoch_s[-1]) + every
        self.diagnostics.reset()
        if p.kind == "initial":
            self.monitor = FeedMonitor(self.feed_id, stream, config, last_seen=p.last_seen)
            self.history = RingBuffer(self.settings.refit_window_points, p.request.values)
            self.window, self.window_valid = [], 0
            self.state = "watching"
            out.state_changes.append(StateChange(
                self.feed_id, "fitting", "watching", self._at_last_slot(),
                f"model version {model_version} ({self.model_label}) installed: {reason}; "
                f"{len(p.buffer)} buffered readings replayed"))
            for i, (value, ts) in enumerate(p.buffer):
                self._watch(value, ts, p.window_end_slot + i, out)
            return out
        old = self.monitor
        base = p.offset_at_request  # the new model's level is the old one's base plus this
        for value in p.buffer:
            stream.update(value + base)
        shift = old.stream.level_offset - base  # re-anchored since the request
        if shift != 0.0:
            stream.shift_level(shift)
        self.history.add(base)
        monitor = FeedMonitor(self.feed_id, stream, config,
                              last_seen=old.stale.last_seen if old.stale is not None else self.last_seen)
        when = self._at_last_slot()
        for name, life in old.lifecycles.items():
            if not life.is_active:
                continue
            if name in monitor.lifecycles:
                life.parameters = monitor.lifecycles[name].parameters
                monitor.lifecycles[name] = life
            else:
                out.events.append(life.close(when, detail=f"{life.current.detail}; closed: model version "
                                                          f"{model_version} has no {name} rule"))
        self.monitor = monitor
        out.state_changes.append(StateChange(
            self.feed_id, "watching", "watching", when,
            f"model version {model_version} ({self.model_label}) replaced version {old_version} ({old_label}): "
            f"{reason}; {len(p.buffer)} readings since the request replayed"))
        return out

    def refit_failed(self, error: str) -> EngineOutput:
        p = self.pending
        if p is None:
            raise DataError(f"feed {self.feed_id!r}: no refit is pending")
        self.pending = None
        out = EngineOutput()
        at = self._at_last_slot()
        self.last_refit_error = f"{p.request.reason} failed: {error}"
        s = self.settings
        if p.kind == "initial":
            self.window.extend(v for v, _ in p.buffer)
            keep = max(s.train_points, s.refit_window_points)
            if len(self.window) > keep:
                self.window_start += len(self.window) - keep
                self.window = self.window[-keep:]
            self.window_valid = sum(1 for v in self.window if math.isfinite(v))
            self.next_learning_check = self.window_valid + s.min_train_points
            self.state = "learning"
            out.state_changes.append(StateChange(
                self.feed_id, "fitting", "learning", at,
                f"initial fit failed: {error}; learning goes on, next attempt after "
                f"{s.min_train_points} more readings"))
            return out
        if s.refit_every_s is not None and not p.full_selection:
            self.next_refit_epoch_s = at.timestamp() + s.refit_every_s
        out.state_changes.append(StateChange(
            self.feed_id, "watching", "watching", at,
            f"{p.request.reason} failed: {error}; model version {self.model_version} keeps watching"))
        return out

    # ---------------------------------------------------------------- status
    def status(self) -> dict[str, Any]:
        counts = self.cursor.counts if self.cursor is not None else GridCounts()
        active = []
        if self.monitor is not None:
            active = [{"rule": ev.rule, "severity": ev.severity, "start": ev.start.isoformat(),
                       "detail": ev.detail} for ev in self.monitor.open_events()]
        out: dict[str, Any] = {
            "feed_id": self.feed_id,
            "state": self.state,
            "last_reading_time": encode_time(self.last_time),
            "last_value": self.last_value if math.isfinite(self.last_value) else None,
            "model_version": self.model_version,
            "model": self.model_label,
            "model_reason": self.model_reason,
            "fitted_at": encode_time(self.fitted_at),
            "fit_problems": list(self.fit_problems),
            "active_alarms": active,
            "readings": self.readings,
            "slots": self.next_slot,
            "interval_s": None if self.cursor is None else self.cursor.interval_s,
            "rejects": {"late": counts.out_of_order, "duplicate": counts.duplicate, "off_grid": counts.off_grid,
                        **self.rejects},
            "missing_slots": counts.missing,
            "snapped": counts.snapped,
            "refit_pending": None if self.pending is None or self.pending.kind == "initial"
            else self.pending.request.reason,
            "next_refit_at": None if self.next_refit_epoch_s is None else _utc(self.next_refit_epoch_s).isoformat(),
            "last_refit_error": self.last_refit_error,
            "threshold_mode": None if self.thresholds is None else self.thresholds.get("mode"),
            "diagnostics": self.diagnostics.last,
        }
        if self.state == "learning":
            have = self.raw_real if self.cursor is None else self.window_valid
            out["learning"] = {"readings": have, "train_points": self.settings.train_points,
                               "min_train_points": self.settings.min_train_points}
        if self.counter is not None:
            out["counter"] = {**self.counter.counts, "meter_resets": self.meter_resets}
        return out

    # ----------------------------------------------------------- checkpoint
    def checkpoint(self) -> bytes:
        if self.state != "watching":
            raise DataError(f"feed {self.feed_id!r} is {self.state} and has no model to checkpoint yet")
        monitor_state, arrays = snapshot_monitor(self.monitor)
        c = self.cursor
        in_flight = None
        if self.pending is not None:
            in_flight = [self.pending.request.reason, self.pending.full_selection]
        elif self.refit_due is not None:
            in_flight = list(self.refit_due)
        header = {
            "feed_id": self.feed_id,
            "model_version": self.model_version,
            "model_label": self.model_label,
            "model_reason": self.model_reason,
            "fitted_at": encode_time(self.fitted_at),
            "fitted_spec": self.fitted_spec.to_dict(),
            "fitted_calendar": None if self.fitted_calendar is None else self.fitted_calendar.to_dict(),
            "fit_problems": self.fit_problems,
            "next_refit_epoch_s": self.next_refit_epoch_s,
            "cursor": {"origin_epoch_s": c.origin_epoch_s, "interval_s": c.interval_s, "next_slot": c.next_slot,
                       "counts": c.counts.as_dict()},
            "next_slot": self.next_slot,
            "counter": None if self.counter is None else self.counter.to_dict(),
            "thresholds": self.thresholds,
            "thresholds_config": self.thresholds_config,
            "monitor_fingerprint": _fingerprint(self.monitor.config),
            "monitor": monitor_state,
            "diagnostics": {"since_check": self.diagnostics.since_check, "last": self.diagnostics.last},
            "last_diag_refit_slot": self.last_diag_refit_slot,
            "refit_in_flight": in_flight,
            "last_refit_error": self.last_refit_error,
            "request_seq": self.request_seq,
            "stats": {"readings": self.readings, "rejects": self.rejects, "last_time": encode_time(self.last_time),
                      "last_value": self.last_value, "last_seen": encode_time(self.last_seen),
                      "meter_resets": self.meter_resets},
        }
        arrays["stream"] = np.frombuffer(self.monitor.stream.to_bytes(), dtype=np.uint8)
        arrays["history"] = self.history.to_array()
        arrays["diagnostics_z"] = np.array(self.diagnostics.z, dtype=float)
        return pack(header, arrays)

    @classmethod
    def from_checkpoint(cls, feed_id: str, settings: FeedSettings, data: bytes,
                        model_version: int) -> tuple["_Feed", EngineOutput]:
        header, arrays = unpack(data)
        try:
            return cls._from_parts(feed_id, settings, header, arrays, model_version)
        except (KeyError, TypeError, ValueError) as exc:
            if isinstance(exc, (StateFormatError, ConfigError)):
                raise
            raise StateFormatError(f"feed {feed_id!r}: checkpoint is corrupt: {exc!r}") from exc

    @classmethod
    def _from_parts(cls, feed_id: str, settings: FeedSettings, header: dict[str, Any],
                    arrays: dict[str, np.ndarray], model_version: int) -> tuple["_Feed", EngineOutput]:
        if header["feed_id"] != feed_id:
            raise StateFormatError(f"checkpoint is of feed {header['feed_id']!r}, not {feed_id!r}")
        stream = Stream.from_bytes(arrays["stream"].tobytes())
        if stream.model_version != model_version or header["model_version"] != model_version:
            raise StateFormatError(f"feed {feed_id!r}: checkpoint holds model version {stream.model_version}, "
                                   f"not {model_version}")
        saved_cursor = header["cursor"]
        if settings.interval_s is not None and settings.interval_s != saved_cursor["interval_s"]:
            raise StateFormatError(f"feed {feed_id!r}: interval_s is now {settings.interval_s:g} s, the checkpoint's "
                                   f"grid has {saved_cursor['interval_s']:g} s; the feed must learn again")
        if settings.counter != (header["counter"] is not None):
            raise StateFormatError(f"feed {feed_id!r}: counter is now {settings.counter}, the checkpoint was "
                                   f"taken with counter {header['counter'] is not None}; the feed must learn again")
        feed = cls(feed_id, settings)
        out = EngineOutput()
        cursor = GridCursor(saved_cursor["origin_epoch_s"], saved_cursor["interval_s"], settings.grid_tolerance,
                            saved_cursor["next_slot"])
        cursor.counts = GridCounts(**saved_cursor["counts"])
        feed.cursor = cursor
        feed.next_slot = int(header["next_slot"])
        if header["counter"] is not None:  # the saved baseline, the current register settings
            feed.counter = CounterDeltas.from_dict(header["counter"], register_size=settings.register_size,
                                                   reset_drop_fraction=settings.reset_drop_fraction)
        feed.model_version = model_version
        feed.model_label = header["model_label"]
        feed.model_reason = header["model_reason"]
        feed.fitted_at = decode_time(header["fitted_at"])
        feed.fitted_spec = ModelSpec.from_dict(header["fitted_spec"])
        feed.fitted_calendar = (None if header["fitted_calendar"] is None
                                else CalendarTerms.from_dict(header["fitted_calendar"]))
        feed.fit_problems = list(header["fit_problems"])
        feed.next_refit_epoch_s = header["next_refit_epoch_s"]
        if settings.refit_every_s is None:
            feed.next_refit_epoch_s = None
        elif feed.next_refit_epoch_s is None:
            feed.next_refit_epoch_s = feed.fitted_at.timestamp() + settings.refit_every_s
        thresholds = header["thresholds"]
        feed.thresholds_config = header["thresholds_config"]
        current = json.loads(json.dumps(settings.thresholds_config(cursor.interval_s)))  # as saved
        if current != feed.thresholds_config:
            if settings.threshold_mode == "sigma":
                thresholds = sigma_thresholds(**current["sigma_limits"])
                feed.thresholds_config = current
            else:  # budget limits need the fit's residuals: a refit sets them
                feed.refit_due = ("threshold settings changed", False)
        feed.thresholds = thresholds
        stats = header["stats"]
        feed.readings = int(stats["readings"])
        feed.rejects.update(stats["rejects"])
        feed.last_time = decode_time(stats["last_time"])
        feed.last_value = float(stats["last_value"])
        feed.last_seen = decode_time(stats["last_seen"])
        feed.meter_resets = int(stats["meter_resets"])
        config = feed._monitor_config(thresholds)
        monitor = FeedMonitor(feed_id, stream, config, last_seen=feed.last_seen)
        if _fingerprint(config) == header["monitor_fingerprint"]:
            restore_monitor(monitor, header["monitor"], arrays)
            resumed = "rule states restored"
        else:
            when = feed.last_time or feed._at_last_slot()
            for event in saved_open_events(header["monitor"], arrays):
                out.events.append(event.cleared(max(when, event.start),
                                                detail=f"{event.detail}; closed at restart: the feed's rule "
                                                       "settings changed"))
            resumed = "rule settings changed, rule states restarted"
        feed.monitor = monitor
        feed.history = RingBuffer(settings.refit_window_points, arrays["history"])
        feed.diagnostics.z.extend(arrays["diagnostics_z"].tolist())
        feed.diagnostics.since_check = int(header["diagnostics"]["since_check"])
        feed.diagnostics.last = header["diagnostics"]["last"]
        feed.last_diag_refit_slot = header["last_diag_refit_slot"]
        feed.last_refit_error = header["last_refit_error"]
        feed.request_seq = int(header["request_seq"])
        if header["refit_in_flight"] is not None and feed.refit_due is None:
            reason, full = header["refit_in_flight"]
            again = " (requested again after a restart)"
            feed.refit_due = (reason if reason.endswith(again) else reason + again, bool(full))
        feed.state = "watching"
        out.state_changes.append(StateChange(
            feed_id, "new", "watching", feed.last_time or feed._at_last_slot(),
            f"resumed from checkpoint at slot {feed.next_slot} with model version {model_version} "
            f"({feed.model_label}); no learning phase; {resumed}"))
        return feed, out


# ===================================================================== engine
class Engine:
    """Readings and ticks in; events, state changes and refit requests out (module docstring).

    Parameters
    ----------
    settings_for : callable
        ``settings_for(feed_id) -> FeedSettings``, called once per feed, at
        its first reading or its restore.
    """

    def __init__(self, settings_for: Callable[[str], FeedSettings]) -> None:
        self._settings_for = settings_for
        self._feeds: dict[str, _Feed] = {}
        self._clock: datetime | None = None
        self._queued = EngineOutput()

    def _take_queued(self) -> EngineOutput:
        out, self._queued = self._queued, EngineOutput()
        return out

    def _get(self, feed_id: str) -> _Feed:
        try:
            return self._feeds[feed_id]
        except KeyError:
            raise DataError(f"unknown feed {feed_id!r}") from None

    @property
    def feed_ids(self) -> list[str]:
        return list(self._feeds)

    def state_of(self, feed_id: str) -> str:
        """``learning``, ``fitting`` or ``watching``."""
        return self._get(feed_id).state

    def process(self, reading: Reading) -> EngineOutput:
        """Take one reading of any feed.

        Output queued by :meth:`restore` is delivered with it.
        """
        if not isinstance(reading, Reading):
            raise DataError(f"Engine.process needs a Reading, got {type(reading).__name__}")
        out = self._take_queued()
        feed = self._feeds.get(reading.feed_id)
        if feed is None:
            feed = _Feed(reading.feed_id, self._settings_for(reading.feed_id))
            self._feeds[reading.feed_id] = feed
            out.state_changes.append(StateChange(reading.feed_id, "new", "learning", reading.timestamp,
                                                 "first reading; learning the feed's model"))
        return out.extend(feed.process(reading, self._clock))

    def tick(self, now: datetime) -> EngineOutput:
        """Advance the clock (wall-clock time live, data time in a replay): stale feeds."""
        if not isinstance(now, datetime) or now.tzinfo is None:
            raise DataError(f"Engine.tick needs a timezone-aware datetime, got {now!r}")
        self._clock = now
        out = self._take_queued()
        for feed in self._feeds.values():
            out.extend(feed.tick(now))
        return out

    def install_model(self, feed_id: str, fitted: FittedModel, model_version: int, reason: str,
                      thresholds: dict[str, Any] | None = None,
                      request: RefitRequest | None = None) -> EngineOutput:
        """Swap in a finished fit for the feed's pending request.

        Parameters
        ----------
        feed_id : str
        fitted : FittedModel
            :func:`run_refit` of the pending request.
        model_version : int
            The version the service recorded for this model.
        reason : str
            Why it was fitted (usually the request's reason), shown in status.
        thresholds : dict, optional
            Limits from :func:`thresholds_for` (computed here when omitted).
        request : RefitRequest, optional
            The request answered; refused when it is not the pending one.

        Returns
        -------
        EngineOutput
            The state change, and for an initial fit the events of the
            replayed readings.
        """
        out = self._take_queued()
        return out.extend(self._get(feed_id).install(fitted, model_version, reason, thresholds, request))

    def refit_failed(self, feed_id: str, error: str) -> EngineOutput:
        """Report that the pending fit failed (``str(FitError)``); the feed goes on as described above."""
        out = self._take_queued()
        return out.extend(self._get(feed_id).refit_failed(str(error)))

    def checkpoint(self, feed_id: str) -> bytes:
        """The feed's whole state as bytes (:mod:`.feed_state`); only a feed with a model has one."""
        return self._get(feed_id).checkpoint()

    def checkpoints(self) -> dict[str, tuple[bytes, int]]:
        """``{feed_id: (state bytes, model_version)}`` of every feed that has a model."""
        return {fid: (feed.checkpoint(), feed.model_version) for fid, feed in self._feeds.items()
                if feed.monitor is not None and feed.state == "watching"}

    def restore(self, feed_id: str, state: bytes, model_version: int) -> None:
        """Resume a feed from its checkpoint: watching at once, no learning phase, no refit.

        The state change (and, rarely, the closing of episodes whose rule
        settings changed) is delivered with the next output of
        :meth:`process`, :meth:`tick` or :meth:`install_model`. A refit that
        was in flight at checkpoint time is requested again at the next slot.

        Raises
        ------
        StateFormatError
            Bytes that are not a checkpoint of this feed and version, or a
            grid or counter setting that changed since (the feed must learn again).
        """
        if feed_id in self._feeds:
            raise DataError(f"feed {feed_id!r} is already running; restore it before its first reading")
        feed, out = _Feed.from_checkpoint(feed_id, self._settings_for(feed_id), state, model_version)
        self._feeds[feed_id] = feed
        self._queued.extend(out)

    def status(self) -> list[dict[str, Any]]:
        """One JSON-serialisable dict per feed (see ``_Feed.status``), sorted by feed id."""
        return [self._feeds[fid].status() for fid in sorted(self._feeds)]
