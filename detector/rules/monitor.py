"""FeedMonitor: every configured rule on one feed, one reading at a time.

For each reading :meth:`FeedMonitor.process` does, in order:

1. **Engineering range.** A value out of range raises the ``range`` alarm at
   once and is *not* fed to the model: the slot is passed to the stream as
   missing (predict only), so the model's grid stays aligned and no other
   rule sees the value.
2. **Score without moving the state**: ``inn = stream.peek(value)``.
3. **Outlier insulation**: ``absorb = not (spike episode open or |z| >=
   insulation_abs_z)`` (default: the spike warning limit), then
   ``inn = stream.update(value, absorb=absorb)``. A wild reading is scored
   but does not pull later forecasts, so it gives one spike event and not a
   train of follow-on alarms. The reading after the first insulated one is
   also scored as if that one had been absorbed (the *shock view*); when
   that explains it better, the process itself took a step (an innovation
   outlier rather than a wild reading), the reading is absorbed and the
   rules see the shock view's innovation (see :meth:`FeedMonitor._shock_view`).
4. **The rules** (spike, CUSUM, EWMA when configured, noise burst, flatline),
   each through its own :class:`~.lifecycle.AlarmLifecycle`.
5. **Re-anchoring**: when the CUSUM confirms a level shift, the forecasts
   are moved to the new level with ``stream.shift_level(delta)``, delta
   estimated from the run of innovations with the model's step response
   (:mod:`.level_shift`: the part of the shift the state has not already
   followed), once a second signal in the same direction within the same
   CUSUM episode has confirmed the shift (``confirmations``);
   ``settle_steps`` readings later the new level is estimated once more and
   the two estimates are combined by their variances. The CUSUM restarts
   (it does so itself), and the EWMA and the noise-burst window, which hold
   innovations scored against the old level, restart too.
   This is the only way the state follows a sudden change. A CUSUM signal
   while the noise-burst rule is open (or would open on this step) is
   reported, but does not re-anchor: a wider spread, not a new level,
   explains it.

:meth:`FeedMonitor.tick` drives the clock-based ``stale`` rule.

Every event carries :data:`~leadline.detector.events.CAUTION`: the alarms
are advisory.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field, replace
from datetime import datetime
from typing import Any

import numpy as np

from ..errors import DataError, RuleError
from ..events import AlarmEvent
from ..innovation import Innovation
from .cusum import CusumRule, TabularCusum
from .ewma import EwmaChart, EwmaRule
from .flatline import FlatlineRule
from .level_shift import estimate_level_shift
from .lifecycle import AlarmLifecycle, LifecycleConfig
from .noise_burst import NoiseBurstRule
from .range_check import RangeRule
from .spike import SpikeRule
from .stale import StaleRule
from .thresholds import sigma_thresholds, validate_thresholds


def _default_lifecycles() -> dict[str, LifecycleConfig]:
    return {
        # a short off-delay keeps a spike and its immediate neighbours, or the
        # first readings of a large level shift, in one episode
        "spike": LifecycleConfig(1, 1, 3),
        # a drift makes the CUSUM confirm again every few steps after each
        # re-anchoring; the off-delay keeps that inside one episode
        "cusum": LifecycleConfig(1, 1, 12),
        "ewma": LifecycleConfig(1, 1, 12),
        "noise_burst": LifecycleConfig(1, 1, 3),
        "flatline": LifecycleConfig(1, 1, 1),
        "range": LifecycleConfig(1, 1, 1),
        "stale": LifecycleConfig(1, 1, 1),
    }


@dataclass
class MonitorConfig:
    """What to watch on one feed.

    Parameters
    ----------
    thresholds : dict
        Limits from :func:`~.thresholds.budget_thresholds` or
        :func:`~.thresholds.sigma_thresholds` (default: sigma mode defaults).
    interval_s : float or None
        Nominal reading interval; enables the ``stale`` rule.
    stale_missing_intervals : float
        Silence, in nominal intervals, before ``stale`` is raised.
    range_low, range_high : float or None
        The engineering range; both None disables the ``range`` rule.
    flatline_tolerance, flatline_resolution : float
        See :class:`~.flatline.FlatlineRule`; the resolution used is the larger
        of this and the one stored in the thresholds.
    lifecycles : dict of str to LifecycleConfig
        On-delay and off-delay per rule; missing names take the defaults.
    insulate_outliers : bool
        Score wild readings with ``absorb=False`` (see the module docstring).
    insulation_abs_z : float or None
        |z| from which a reading is not absorbed; None: the spike warning
        limit. While a spike episode is open no reading is absorbed either.
    shock_abs_z : float or None
        The shock view (see :meth:`FeedMonitor._shock_view`) takes a reading
        as following a process shock when its |z| in that view is below
        this; None turns the shock view off.
    reanchor : bool
        Re-anchor the forecasts after a CUSUM-confirmed level shift.
    confirmations : int
        CUSUM signals in the same direction, within one open CUSUM episode,
        needed before the forecasts are re-anchored (>= 1). A false signal
        is rarely followed by another one soon; a real shift keeps
        signalling. Re-anchoring on a false signal would create the very
        offset it reports, and the next signal would move the level back.
    settle_steps : int
        Readings after a re-anchoring from which the new level is estimated
        again, and corrected; 0 disables the correction.
    rules : tuple of str or None
        The innovation rules to run (default: all configured ones).
    """

    thresholds: dict[str, Any] = field(default_factory=sigma_thresholds)
    interval_s: float | None = None
    stale_missing_intervals: float = 5.0
    range_low: float | None = None
    range_high: float | None = None
    flatline_tolerance: float = 0.0
    flatline_resolution: float = 0.0
    lifecycles: dict[str, LifecycleConfig] = field(default_factory=dict)
    insulate_outliers: bool = True
    insulation_abs_z: float | None = None
    shock_abs_z: float | None = 2.0
    reanchor: bool = True
    confirmations: int = 2
    settle_steps: int = 24
    rules: tuple[str, ...] | None = None


INNOVATION_RULES = ("spike", "cusum", "ewma", "noise_burst", "flatline")
#: Steps of innovations kept for estimating a confirmed level shift.
HISTORY_STEPS = 1024


class FeedMonitor:
    """All rules of one feed, fed one reading at a time.

    Parameters
    ----------
    feed_id : str
    stream : Stream
        The feed's model (``FittedModel.stream()``), positioned at the slot
        of the first reading to be processed.
    config : MonitorConfig, optional
    last_seen : datetime, optional
        Time of the last known reading, where the ``stale`` clock starts.
    """

    def __init__(self, feed_id: str, stream: Any, config: MonitorConfig | None = None,
                 last_seen: datetime | None = None) -> None:
        self.feed_id = feed_id
        self.stream = stream
        self.config = config or MonitorConfig()
        th = validate_thresholds(self.config.thresholds)
        lifecycles = {**_default_lifecycles(), **self.config.lifecycles}
        unknown = set(self.config.lifecycles) - set(_default_lifecycles())
        if unknown:
            raise RuleError(f"lifecycles: unknown rules {sorted(unknown)}")
        wanted = set(INNOVATION_RULES if self.config.rules is None else self.config.rules)
        bad = wanted - set(INNOVATION_RULES)
        if bad:
            raise RuleError(f"rules: unknown innovation rules {sorted(bad)}; known: {INNOVATION_RULES}")

        sp = th["spike"]
        self.spike = SpikeRule(sp["warning_abs_z"], sp["alarm_abs_z"], sp["clear_abs_z"])
        screen = self.spike.alarm_abs_z
        self.insulation_abs_z = (self.spike.warning_abs_z if self.config.insulation_abs_z is None
                                 else float(self.config.insulation_abs_z))
        if not self.insulation_abs_z > 0:
            raise RuleError(f"insulation_abs_z must be > 0, got {self.config.insulation_abs_z!r}")
        # the CUSUM holds back what the stream does not absorb, until the next reading decides
        self.cusum = CusumRule(TabularCusum(th["cusum"]["k"], th["cusum"]["h"],
                                            th["cusum"].get("head_start", 0.0), screen_abs_z=self.insulation_abs_z,
                                            clip_abs_z=th["cusum"].get("clip_abs_z")))
        self.ewma = None
        if th.get("ewma") is not None and "ewma" in wanted:
            self.ewma = EwmaRule(EwmaChart(th["ewma"]["lam"], th["ewma"]["limit_sigmas"]))
        nb = th["noise_burst"]
        self.noise_burst = NoiseBurstRule(int(nb["window"]), nb["tail_probability"],
                                          max(nb["tail_probability"], nb.get("clear_probability", 0.05)),
                                          screen_abs_z=screen, clip_abs_z=nb.get("clip_abs_z"),
                                          limit_scale=nb["limit_scale"])
        resolution = max(self.config.flatline_resolution, float(th["flatline"].get("resolution", 0.0)))
        self.flatline = FlatlineRule(self.config.flatline_tolerance, resolution,
                                     th["flatline"]["run_probability_limit"])
        self._rules: list[Any] = [r for r in (self.spike, self.cusum, self.ewma, self.noise_burst, self.flatline)
                                  if r is not None and r.name in wanted]
        self.range = None
        if self.config.range_low is not None or self.config.range_high is not None:
            self.range = RangeRule(self.config.range_low, self.config.range_high)
        self.stale = None
        if self.config.interval_s is not None:
            self.stale = StaleRule(self.config.interval_s, self.config.stale_missing_intervals, last_seen)

        self.lifecycles: dict[str, AlarmLifecycle] = {}
        for rule in [*self._rules, self.range, self.stale]:
            if rule is not None:
                self.lifecycles[rule.name] = AlarmLifecycle(feed_id, rule.name, rule.parameters(),
                                                            lifecycles[rule.name])
        if isinstance(self.config.confirmations, bool) or not isinstance(self.config.confirmations, int) \
                or self.config.confirmations < 1:
            raise RuleError(f"confirmations must be an integer >= 1, got {self.config.confirmations!r}")
        self.readings = 0
        self.not_absorbed = 0
        self.shocks = 0
        # (forecast offset, variance) of the next slot had the last insulated reading been absorbed
        self._pending_shock: tuple[float, float] | None = None
        self._last_absorbed = True
        self.reanchors = 0
        self.last_innovation: Innovation | None = None
        # (z, std, absorbed) of recent steps, for the re-anchoring estimate
        self._history: deque[tuple[float, float, bool]] = deque(maxlen=HISTORY_STEPS)
        self._settle: list[tuple[float, float, bool]] | None = None
        self._settle_prior_se = 0.0
        self._steps = 0  # stream steps taken, the index of the history's last entry
        self._pending: tuple[int, int, int] | None = None  # (direction, first step, signals) unconfirmed
        self.last_reanchor: dict[str, Any] | None = None

    # ---------------------------------------------------------------- public
    def process(self, value: float, timestamp: datetime) -> list[AlarmEvent]:
        """Score one reading (NaN for a missing slot) and run every rule.

        Returns
        -------
        list of AlarmEvent
            Onset and clearing events of this step (usually empty).
        """
        if not isinstance(timestamp, datetime) or timestamp.tzinfo is None:
            raise DataError(f"feed {self.feed_id!r}: reading timestamp must be a timezone-aware datetime, "
                            f"got {timestamp!r}")
        value = math.nan if value is None else float(value)
        self.readings += 1
        version = self.stream.model_version
        events: list[AlarmEvent] = []
        if not math.isnan(value) and self.stale is not None:
            self.stale.seen(timestamp)
            life = self.lifecycles["stale"]
            if life.is_active:
                events.append(life.close(timestamp))

        if self.range is not None and not math.isnan(value):
            verdict = self.range.assess(value)
            life = self.lifecycles["range"]
            if verdict.severity is not None:
                onset = replace(self.stream.peek(math.nan), value=value, timestamp=timestamp)
                events += life.step(verdict, timestamp, onset, version)
                self.last_innovation = self.stream.update(math.nan)
                self._history.append((math.nan, self.last_innovation.std, False))
                self._steps += 1
                self.cusum.cusum.update(math.nan)
                return events
            events += life.step(verdict, timestamp, None, version)

        absorb = True
        shock = None
        io = None
        if self.config.insulate_outliers and not math.isnan(value):
            peek = self.stream.peek(value)
            shock = self._shock_view(peek)
            if shock is None:
                spike_life = self.lifecycles.get("spike")
                spike_open = spike_life is not None and spike_life.is_active
                absorb = not (spike_open or abs(peek.z) >= self.insulation_abs_z)
            if not absorb:
                io = self._shock_offset(peek)
        if not math.isnan(value):
            self._pending_shock = None
        inn = self.stream.update(value, absorb=absorb)
        if not math.isnan(value) and not absorb:
            self.not_absorbed += 1
            # only the first insulated reading of a run is open to the shock view:
            # two in a row already look like a shift, not a single shock
            self._pending_shock = io if self._last_absorbed else None
        if not math.isnan(value):
            self._last_absorbed = absorb
        # the level-shift estimate models what the filter itself did, so the
        # history keeps the stream's own innovation even under the shock view
        record = (inn.z, inn.std, inn.absorbed)
        self._history.append(record)
        self._steps += 1
        if self._settle is not None:
            self._settle.append(record)
        if shock is not None:
            inn = shock
            self.shocks += 1
        inn = replace(inn, timestamp=timestamp)
        self.last_innovation = inn

        burst_before = self.lifecycles["noise_burst"].is_active if "noise_burst" in self.lifecycles else False
        signal = None
        burst_now = False
        for rule in self._rules:
            verdict = rule.assess(inn)
            if rule is self.cusum:
                signal = rule.last_signal
            if rule is self.noise_burst and verdict is not None and verdict.severity is not None:
                burst_now = True
            events += self.lifecycles[rule.name].step(verdict, timestamp, inn, version)

        if signal is not None and self.config.reanchor:
            self._on_signal(signal, timestamp, burst_before or burst_now)
        elif self._settle is not None and sum(math.isfinite(z) for z, _, _ in self._settle) >= self.config.settle_steps:
            estimate = estimate_level_shift(self.stream.system, self.stream.cov, self._settle, search=False)
            self._settle = None
            if estimate is not None:
                # inverse-variance combination with the first estimate: move by its share of the correction
                prior = self._settle_prior_se ** 2
                weight = prior / (prior + estimate.std_error ** 2) if prior > 0 else 1.0
                self._reanchor(weight * estimate.delta, estimate, timestamp, "settled")
        cusum_life = self.lifecycles.get("cusum")
        if self._pending is not None and (cusum_life is None or not cusum_life.is_active):
            self._pending = None
        return events

    def tick(self, now: datetime) -> list[AlarmEvent]:
        """Advance the clock to ``now`` (UTC); raises ``stale`` when the feed has gone silent."""
        if self.stale is None:
            return []
        if not isinstance(now, datetime) or now.tzinfo is None:
            raise DataError(f"feed {self.feed_id!r}: tick time must be a timezone-aware datetime, got {now!r}")
        found = self.stale.assess(now)
        if found is None:
            return []
        verdict, start = found
        event = self.lifecycles["stale"].open_now(verdict, start, None, self.stream.model_version)
        return [] if event is None else [event]

    def open_events(self) -> list[AlarmEvent]:
        """The episodes open now, one per rule at most."""
        return [life.current for life in self.lifecycles.values() if life.current is not None]

    def status(self) -> dict[str, Any]:
        """JSON-serialisable rule states and statistics, for display and the engine's state file."""
        rules = {name: life.status() for name, life in self.lifecycles.items()}
        if "spike" in rules:
            last = self.last_innovation
            rules["spike"]["last_abs_z"] = abs(last.z) if last is not None and math.isfinite(last.z) else None
        if "cusum" in rules:
            rules["cusum"].update(s_hi=self.cusum.cusum.s_hi, s_lo=self.cusum.cusum.s_lo, h=self.cusum.cusum.h)
        if "ewma" in rules:
            rules["ewma"].update(value=self.ewma.chart.value, limit=self.ewma.chart.limit())
        if "noise_burst" in rules:
            rules["noise_burst"].update(sum_z2=self.noise_burst.statistic, valid=self.noise_burst.valid,
                                        limit=(self.noise_burst.limit()
                                               if math.isfinite(self.noise_burst.limit()) else None))
        if "flatline" in rules:
            rules["flatline"].update(run_steps=self.flatline.run_steps,
                                     log10_run_probability=self.flatline.log_run_probability / math.log(10)
                                     if math.isfinite(self.flatline.log_run_probability) else None)
        if "stale" in rules:
            due = self.stale.due()
            rules["stale"]["due"] = due.isoformat() if due else None
        return {"feed_id": self.feed_id, "readings": self.readings, "not_absorbed": self.not_absorbed,
                "shocks": self.shocks,
                "reanchors": self.reanchors, "last_reanchor": self.last_reanchor, "level_offset": getattr(self.stream, "level_offset", None),
                "model_version": self.stream.model_version, "rules": rules}

    def set_stream(self, stream: Any) -> None:
        """Continue on a new model (after a refit): open episodes stay open, statistics restart."""
        self.stream = stream
        self.cusum.cusum.reset()
        if self.ewma is not None:
            self.ewma.chart.reset()
        self.noise_burst.reset()
        self.flatline.reset()

    # ------------------------------------------------------------- internals
    def _shock_offset(self, peek: Innovation) -> tuple[float, float]:
        """For a reading about to be insulated: how the next forecast would differ had it been absorbed.

        Absorbing v_t adds K_t v_t to the next state, so Z K_t v_t to the next
        forecast, with K_t = T P_t Z' / F_t; the next variance would be
        Z P' Z' + H with P' = T (P_t - P_t Z' Z P_t / F_t) T' + R Q R'.
        """
        system = self.stream.system
        P = self.stream.cov
        Z, T = system.design, system.transition
        PZ = P @ Z
        F = peek.variance
        offset = float(Z @ (T @ PZ)) / F * peek.error
        P_next = T @ (P - np.outer(PZ, PZ) / F) @ T.T + system.state_cov
        return offset, float(Z @ P_next @ Z) + float(system.obs_cov)

    def _shock_view(self, peek: Innovation) -> Innovation | None:
        """The reading after an insulated one, scored as if that one had been absorbed, when that fits better.

        An insulated reading is assumed to be a wild *reading* (an additive
        outlier): the process did not move. If instead the process itself
        took a large step (an innovation outlier), the next reading follows
        the step, and scored against the unabsorbed state it looks wild too,
        which would raise follow-on alarms. So the next reading is scored
        both ways; when the absorbed view explains it (|z| below
        ``shock_abs_z``, and smaller than the other view's), the reading is
        absorbed (for an AR model this puts the state back in step exactly)
        and the rules see the absorbed view's innovation. Only the first
        insulated reading of a run is judged this way.
        """
        pending = self._pending_shock
        if pending is None or self.config.shock_abs_z is None or not math.isfinite(peek.z):
            return None
        offset, variance = pending
        if offset == 0.0 or not variance > 0:
            return None
        sd = math.sqrt(variance)
        forecast = peek.forecast + offset
        error = peek.value - forecast
        z = error / sd
        if not (abs(z) < self.config.shock_abs_z and abs(z) < abs(peek.z)):
            return None
        half = (peek.upper - peek.lower) / 2.0 / peek.std * sd
        return replace(peek, forecast=forecast, error=error, variance=variance, z=z, lower=forecast - half,
                       upper=forecast + half, absorbed=True)

    def _on_signal(self, signal: Any, when: datetime, burst: bool) -> None:
        """Decide whether a CUSUM signal re-anchors the forecasts (see the module docstring)."""
        start = self._steps - signal.run_calls + 1
        if burst:
            self._pending = None
            return
        if self._pending is not None and self._pending[0] == signal.direction:
            direction, first, count = self._pending
            count += 1
        else:
            direction, first, count = signal.direction, start, 1
        if count < self.config.confirmations:
            self._pending = (direction, first, count)
            return
        self._pending = None
        history = list(self._history)
        run = history[max(0, len(history) - (self._steps - first + 1)):]
        estimate = estimate_level_shift(self.stream.system, self.stream.cov, run)
        if estimate is not None:
            self._reanchor(estimate.delta, estimate, when, "confirmed")
            self._settle = [] if self.config.settle_steps > 0 else None
            self._settle_prior_se = estimate.std_error

    def _reanchor(self, delta: float, estimate: Any, when: datetime, stage: str) -> None:
        if not math.isfinite(delta) or delta == 0.0:
            return
        self.stream.shift_level(delta)
        self.reanchors += 1
        self.last_reanchor = {"time": when.isoformat(), "stage": stage, "delta": delta,
                              "shift_estimate": estimate.size, "std_error": estimate.std_error}
        if self.ewma is not None:
            self.ewma.chart.reset()
        self.noise_burst.reset()
