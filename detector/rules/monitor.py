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
4. **The rules**: the innovation rules of the registry (:mod:`.registry`:
   spike, CUSUM, EWMA when configured, noise burst, flatline, in that
   order), each through its own :class:`~.lifecycle.AlarmLifecycle`.
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

6. **The level condition** (:class:`~.level_condition.LevelCondition`):
   every finite in-range reading, less the model's calendar part x_t' beta,
   is kept, except while a flatline episode is open (a frozen transmitter's
   readings are not the process, so they never become the level before).
   When a CUSUM episode opens, the level before its run is frozen;
   while the readings stay away from it the episode stays open (the CUSUM's
   verdict becomes the deadband), and once the departure was established
   and the readings have returned, it clears after the off-delay whatever
   the CUSUM says; the return is followed by one re-anchoring (unless the
   CUSUM already followed it) and the CUSUM restarts, so the return opens
   nothing. Later signals inside the episode (a drift) make no new event;
   the detail shows the level now against the level before.
   :meth:`FeedMonitor.accept_level` closes the episode on an operator's word.
7. **Stale**: a reading that ends a gap in reading time longer than the
   limit is one outage, opened at the gap's start and closed at the
   reading; a live outage closes at the next reading, its length in words.

:meth:`FeedMonitor.process` returns a :class:`StepResult` (the events, the
innovation, and whether the step re-anchored or left episodes open).
:meth:`FeedMonitor.tick` drives the clock-based ``stale`` rule.
:meth:`FeedMonitor.carry_over` continues the open episodes of the previous
model's monitor after a refit. The monitor reaches its rules only through
the contract of :mod:`.contract` (``skip_slot`` for an out-of-range slot,
``level_moved`` after a re-anchoring), except the spike limits, which set
the insulation and screening levels, and the CUSUM's signal, which drives
the re-anchoring.

Every event carries :data:`~leadline.detector.events.CAUTION`: the alarms
are advisory.
"""

from __future__ import annotations

import math
from dataclasses import replace
from datetime import datetime
from typing import Any

import numpy as np

from ..errors import DataError, RuleError, StateFormatError
from ..events import AlarmEvent
from ..innovation import Innovation, stamped
from . import registry
from .contract import BuildContext, check_state, innovation_from_json, innovation_to_json
from .level_condition import LevelCondition
from .level_shift import MAX_RUN_STEPS, estimate_level_shift
from .lifecycle import AlarmLifecycle
from .limits import AlarmLimits
from .monitor_config import MonitorConfig, StepResult
from .monitor_episodes import LevelEpisodes
from .step_history import StepHistory


__all__ = ["FeedMonitor", "MonitorConfig", "StepResult", "INNOVATION_RULES", "HISTORY_STEPS"]

#: The innovation rules, in the order they are assessed.
INNOVATION_RULES = registry.rule_names("innovation")
#: Steps of innovations kept for estimating a confirmed level shift: all the estimate reads.
HISTORY_STEPS = MAX_RUN_STEPS


class FeedMonitor(LevelEpisodes):
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
    recent_readings : array_like, optional
        The readings before the first one to be processed (the training
        window, NaN for missing slots): the level condition's first "level
        before" comes from them.
    """

    @property
    def spike(self) -> Any:
        """The spike rule, when it runs (None otherwise)."""
        return self.rules.get("spike")

    def __init__(self, feed_id: str, stream: Any, config: MonitorConfig | None = None,
                 last_seen: datetime | None = None, recent_readings: Any = None) -> None:
        self.feed_id = feed_id
        self.stream = stream
        self.config = config or MonitorConfig()
        th = AlarmLimits.of(self.config.thresholds)
        defaults = registry.default_lifecycles()
        lifecycles = {**defaults, **self.config.lifecycles}
        unknown = set(self.config.lifecycles) - set(defaults)
        if unknown:
            raise RuleError(f"lifecycles: unknown rules {sorted(unknown)}")
        known = registry.rule_names("innovation")
        wanted = set(known if self.config.rules is None else self.config.rules)
        bad = wanted - set(known)
        if bad:
            raise RuleError(f"rules: unknown innovation rules {sorted(bad)}; known: {known}")

        # the spike limits set the screen of the other rules and, by default, the insulation level,
        # so the rule is built even when it is off (a local, not an attribute: CPython shares the
        # keys of instance dicts of at most 29 attributes, and a 30th costs each monitor 1.3 KB)
        spike = registry.entry("spike").build(th["spike"], BuildContext(self.config))
        self.insulation_abs_z = (spike.warning_abs_z if self.config.insulation_abs_z is None
                                 else float(self.config.insulation_abs_z))
        if not self.insulation_abs_z > 0:
            raise RuleError(f"insulation_abs_z must be > 0, got {self.config.insulation_abs_z!r}")
        context = BuildContext(self.config, screen_abs_z=spike.alarm_abs_z,
                               insulation_abs_z=self.insulation_abs_z, last_seen=last_seen)
        #: The configured rules by name, in registry order.
        self.rules: dict[str, Any] = {}
        for entry in registry.RULES:
            if entry.kind == "innovation" and entry.name not in wanted:
                continue
            rule = spike if entry.name == "spike" else entry.build(th.get(entry.name), context)
            if rule is not None:
                self.rules[entry.name] = rule
        self._innovation_rules = [rule for name, rule in self.rules.items()
                                  if registry.entry(name).kind == "innovation"]
        self.cusum = self.rules.get("cusum")
        self.noise_burst = self.rules.get("noise_burst")
        self.range = self.rules.get("range")
        self.stale = self.rules.get("stale")

        self.lifecycles: dict[str, AlarmLifecycle] = {
            name: AlarmLifecycle(feed_id, name, rule.parameters(), lifecycles[name]) for name, rule in self.rules.items()}
        if isinstance(self.config.confirmations, bool) or not isinstance(self.config.confirmations, int) \
                or self.config.confirmations < 1:
            raise RuleError(f"confirmations must be an integer >= 1, got {self.config.confirmations!r}")
        self.readings = 0
        self.not_absorbed = 0
        self.shocks = 0
        # (forecast offset, variance) of the next slot had the last insulated reading been absorbed:
        # the candidate for the shock view
        self._shock_candidate: tuple[float, float] | None = None
        self._last_absorbed = True
        self.reanchors = 0
        self.last_innovation: Innovation | None = None
        # (z, std, absorbed) of recent steps, for the re-anchoring estimate
        self._history = StepHistory(HISTORY_STEPS)
        self._settle: list[tuple[float, float, bool]] | None = None
        self._settle_prior_se = 0.0
        self._steps = 0  # stream steps taken, the index of the history's last entry
        # (direction, first step, signals) of CUSUM signals not yet confirmed
        self._unconfirmed: tuple[int, int, int] | None = None
        self.last_reanchor: dict[str, Any] | None = None
        #: The departure of the readings' level from the level before the open CUSUM episode.
        flat = self.rules.get("flatline")
        self.level = LevelCondition(resolution=float(getattr(flat, "resolution", self.config.flatline_resolution)))
        self._level_age = 0  # readings kept since the condition started
        self._level_onset = ""  # the open CUSUM episode's detail at onset
        self._return_step: int | None = None  # the step at which the condition stopped holding
        self._last_reanchor_step = 0  # the step of the last re-anchoring
        if recent_readings is not None:
            recent = np.asarray(recent_readings, dtype=float).ravel()[-self.level.capacity:]
            regression = getattr(stream, "regression", None)
            if regression is not None and stream.step >= recent.size:
                recent = recent - np.asarray(regression.offsets(stream.step - recent.size, recent.size), dtype=float)
            for value in recent.tolist():
                self.level.observe(value)

    # ---------------------------------------------------------------- public
    def process(self, value: float, timestamp: datetime) -> StepResult:
        """Score one reading (NaN for a missing slot) and run every rule.

        Returns
        -------
        StepResult
            The step's events (iterating the result gives them), its
            innovation and the monitor's state after it.
        """
        if not isinstance(timestamp, datetime) or timestamp.tzinfo is None:
            raise DataError(f"feed {self.feed_id!r}: reading timestamp must be a timezone-aware datetime, "
                            f"got {timestamp!r}")
        reanchors = self.reanchors
        events = self._process(value, timestamp)
        return StepResult(events, self.last_innovation, self.reanchors != reanchors,
                          self.stream.level_offset, any(life.is_active for life in self.lifecycles.values()))

    def _process(self, value: float, timestamp: datetime) -> list[AlarmEvent]:
        value = math.nan if value is None else float(value)
        self.readings += 1
        version = self.stream.model_version
        events: list[AlarmEvent] = []
        if not math.isnan(value) and self.stale is not None:
            events += self._stale_seen(timestamp, version)

        if self.range is not None and not math.isnan(value):
            verdict = self.range.assess(value)
            life = self.lifecycles["range"]
            if verdict.severity is not None:
                onset = replace(self.stream.peek(math.nan), value=value, timestamp=timestamp)
                events += life.step(verdict, timestamp, onset, version)
                self.last_innovation = self.stream.update(math.nan)
                self._history.append(math.nan, self.last_innovation.std, False)
                self._steps += 1
                for name, rule in self.rules.items():
                    if name != "range":
                        rule.skip_slot()
                return events
            events += life.step(verdict, timestamp, None, version)

        flat_life = self.lifecycles.get("flatline")
        if math.isfinite(value) and not (flat_life is not None and flat_life.is_active):
            # a frozen transmitter's readings are not the process: the level before a later episode
            # (the return of the true readings, say) comes from the readings before it froze
            self.level.observe(value - self._calendar_part())
            if self.level.tracking:
                self._level_age += 1

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
            self._shock_candidate = None
        inn = self.stream.update(value, absorb=absorb)
        if not math.isnan(value) and not absorb:
            self.not_absorbed += 1
            # only the first insulated reading of a run is open to the shock view:
            # two in a row already look like a shift, not a single shock
            self._shock_candidate = io if self._last_absorbed else None
        if not math.isnan(value):
            self._last_absorbed = absorb
        # the level-shift estimate models what the filter itself did, so the
        # history keeps the stream's own innovation even under the shock view
        record = (inn.z, inn.std, inn.absorbed)
        self._history.append(*record)
        self._steps += 1
        if self._settle is not None:
            self._settle.append(record)
        if shock is not None:
            inn = shock
            self.shocks += 1
        inn = stamped(inn, timestamp)
        self.last_innovation = inn

        burst_before = self.lifecycles["noise_burst"].is_active if "noise_burst" in self.lifecycles else False
        signal = None
        burst_now = False
        for rule in self._innovation_rules:
            verdict = rule.assess(inn)
            if rule is self.cusum:
                signal = rule.last_signal
                events += self._cusum_step(verdict, signal, timestamp, inn, version)
                continue
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
        if self._unconfirmed is not None and (cusum_life is None or not cusum_life.is_active):
            self._unconfirmed = None
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

    def carry_over(self, old: "FeedMonitor", when: datetime) -> list[AlarmEvent]:
        """Continue the open episodes of ``old``, the monitor of the previous model, in this one.

        Called once, on a monitor just built for a new model (after a
        refit): the statistics of the rules start afresh, but an episode
        open in ``old`` stays open here (same event identity, its state
        machine as it was), its rule now with this monitor's parameters.
        An episode of a rule this monitor does not run is closed at
        ``when``. The ``stale`` clock continues from ``old``'s last reading.

        Returns
        -------
        list of AlarmEvent
            The cleared events of the episodes closed here.
        """
        if old.stale is not None and self.stale is not None:
            self.stale.last_seen = old.stale.last_seen
        # the readings' level and the level before an open episode do not depend on the model
        self.level.load_state(old.level.state_dict())
        self._level_age, self._level_onset, self._return_step = old._level_age, old._level_onset, None
        closed = []
        for name, life in old.lifecycles.items():
            if not life.is_active:
                continue
            if name in self.lifecycles:
                life.parameters = self.lifecycles[name].parameters
                self.lifecycles[name] = life
            else:
                closed.append(life.close(when, detail=f"{life.current.detail}; closed: model version "
                                                      f"{self.stream.model_version} has no {name} rule"))
        return closed

    def status(self) -> dict[str, Any]:
        """JSON-serialisable rule states and statistics, for display and the engine's state file."""
        rules = {name: life.status() for name, life in self.lifecycles.items()}
        for name, rule in self.rules.items():
            rules[name].update(rule.status())
        if "spike" in rules:
            last = self.last_innovation
            rules["spike"]["last_abs_z"] = abs(last.z) if last is not None and math.isfinite(last.z) else None
        return {"feed_id": self.feed_id, "readings": self.readings, "not_absorbed": self.not_absorbed,
                "shocks": self.shocks,
                "reanchors": self.reanchors, "last_reanchor": self.last_reanchor,
                "level_offset": getattr(self.stream, "level_offset", None),
                "model_version": self.stream.model_version, "rules": rules}

    # ----------------------------------------------------------------- state
    #: Layout version of :meth:`state_dict` (2: the level condition added; a version 1 state loads
    #: with the condition tracking nothing, its recent readings empty).
    STATE_VERSION = 2

    def state_dict(self, compact: bool = False) -> dict[str, Any]:
        """The running state of the monitor, its rules and their lifecycles, as plain JSON values.

        Settings are not included: the state is loaded into a monitor built
        from the same configuration (:meth:`MonitorConfig.fingerprint`).
        With ``compact``, the two long tables (the step history, the level
        condition's recent readings) are float arrays instead of lists, for a
        checkpoint to keep as raw bytes (:func:`~..feed_state.snapshot_monitor`);
        :meth:`load_state` takes either form.
        """
        return {
            "v": self.STATE_VERSION,
            "readings": self.readings, "not_absorbed": self.not_absorbed, "shocks": self.shocks,
            "reanchors": self.reanchors, "last_reanchor": self.last_reanchor, "steps": self._steps,
            "shock_candidate": None if self._shock_candidate is None else list(self._shock_candidate),
            "last_absorbed": self._last_absorbed,
            "last_innovation": innovation_to_json(self.last_innovation),
            "history": self._history.table() if compact else [list(row) for row in self._history.rows()],
            "settle": None if self._settle is None else [list(row) for row in self._settle],
            "settle_prior_se": self._settle_prior_se,
            "unconfirmed": None if self._unconfirmed is None else list(self._unconfirmed),
            "rules": {name: rule.state_dict() for name, rule in self.rules.items()},
            "lifecycles": {name: life.state_dict() for name, life in self.lifecycles.items()},
            "level": {"condition": self.level.state_dict(compact), "age": self._level_age, "onset_detail": self._level_onset,
                      "return_step": self._return_step, "last_reanchor_step": self._last_reanchor_step},
        }

    def load_state(self, state: Any) -> None:
        """Take back a :meth:`state_dict` into this monitor (built with the same configuration).

        Raises
        ------
        StateFormatError
            An unknown version, or rules that differ from this monitor's.
        """
        owner = f"monitor of feed {self.feed_id!r}"
        if isinstance(state, dict) and state.get("v") == 1:
            state = {**state, "v": self.STATE_VERSION, "level": None}
        state = check_state(state, owner, self.STATE_VERSION)
        if "level" not in state:
            raise StateFormatError(f"{owner}: saved state of version {self.STATE_VERSION} lacks 'level'")
        for part, mine in (("rules", self.rules), ("lifecycles", self.lifecycles)):
            if set(state[part]) != set(mine):
                raise StateFormatError(f"saved monitor state holds {part} {sorted(state[part])}, "
                                       f"this monitor has {sorted(mine)}")
        self.readings = int(state["readings"])
        self.not_absorbed = int(state["not_absorbed"])
        self.shocks = int(state["shocks"])
        self.reanchors = int(state["reanchors"])
        self.last_reanchor = None if state["last_reanchor"] is None else dict(state["last_reanchor"])
        self._steps = int(state["steps"])
        candidate = state["shock_candidate"]
        self._shock_candidate = None if candidate is None else (float(candidate[0]), float(candidate[1]))
        self._last_absorbed = bool(state["last_absorbed"])
        self.last_innovation = innovation_from_json(state["last_innovation"])
        self._history = StepHistory(HISTORY_STEPS, state["history"])
        settle = state["settle"]
        self._settle = None if settle is None else [_history_row(row) for row in settle]
        self._settle_prior_se = float(state["settle_prior_se"])
        unconfirmed = state["unconfirmed"]
        self._unconfirmed = None if unconfirmed is None else tuple(int(x) for x in unconfirmed)
        for name, rule in self.rules.items():
            rule.load_state(state["rules"][name])
        for name, life in self.lifecycles.items():
            life.load_state(state["lifecycles"][name])
        level = state["level"]
        self.level.reset()
        self._level_age, self._level_onset, self._return_step = 0, "", None
        self._last_reanchor_step = 0
        if level is not None:
            self.level.load_state(level["condition"])
            self._level_age = int(level["age"])
            self._level_onset = str(level["onset_detail"])
            self._return_step = None if level["return_step"] is None else int(level["return_step"])
            self._last_reanchor_step = int(level["last_reanchor_step"])

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
        candidate = self._shock_candidate
        if candidate is None or self.config.shock_abs_z is None or not math.isfinite(peek.z):
            return None
        offset, variance = candidate
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
            self._unconfirmed = None
            return
        if self._unconfirmed is not None and self._unconfirmed[0] == signal.direction:
            direction, first, count = self._unconfirmed
            count += 1
        else:
            direction, first, count = signal.direction, start, 1
        if count < self.config.confirmations:
            self._unconfirmed = (direction, first, count)
            return
        self._unconfirmed = None
        history = self._history.rows()
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
        self._last_reanchor_step = self._steps
        self.last_reanchor = {"time": when.isoformat(), "stage": stage, "delta": delta,
                              "shift_estimate": estimate.size, "std_error": estimate.std_error}
        for rule in self.rules.values():
            rule.level_moved()


def _history_row(row: Any) -> tuple[float, float, bool]:
    z, std, absorbed = row
    return (math.nan if z is None else float(z), math.nan if std is None else float(std), bool(absorbed))
