"""The lifecycle of one feed: learning, fitting, watching, and refits while watching.

:class:`FeedLifecycle` is what :class:`~leadline.detector.engine.Engine`
keeps per feed. Its settings are :class:`~.feed_settings.FeedSettings`, its
innovation checks :class:`~.diagnostics.InnovationDiagnostics`, its fits go
out as :class:`~.refit.RefitRequest`, and its checkpoint format is
:mod:`.feed_state`.

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
    arriving and are placed on the grid and buffered.
    :meth:`Engine.install_model <leadline.detector.engine.Engine.install_model>`
    builds the stream, sets the alarm limits and replays the buffered slots
    through the rules, so the stream ends up at the latest slot. A failed fit
    (:meth:`Engine.refit_failed <leadline.detector.engine.Engine.refit_failed>`)
    goes back to ``learning``, and the fit is tried again after
    ``min_train_points`` more readings.
``watching``
    Every slot is scored by :class:`~leadline.detector.rules.FeedMonitor`.
    A slot with no reading is fed as NaN (predict only), with the slot's
    time. A late, duplicate or off-grid reading is counted and dropped by the
    grid rules. A reading more than ``future_tolerance_s`` ahead of the last
    :meth:`Engine.tick <leadline.detector.engine.Engine.tick>` is counted as ``future`` and dropped.

Refits while watching
---------------------
Scheduled and diagnostics refits of the rolling refit window, and how the
new model takes over, are described in :mod:`.refit`.

Counter feeds
-------------
Register readings become interval deltas (:mod:`.counters`). A meter reset
or replacement is reported as its own event (rule ``meter_reset``, severity
``warning``, opened and closed at the reading), and its slot is missing.
The engineering range applies to the deltas.
"""

from __future__ import annotations

import math
from array import array
from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta, timezone
from typing import Any

import numpy as np

from .counters import CounterDeltas
from .diagnostics import InnovationDiagnostics
from .durations import WEEK_S
from .engine_output import EngineOutput, StateChange
from .errors import ConfigError, DataError, RuleError
from .feed_settings import FeedSettings
from .feed_state import encode_time
from .fitting import FittedModel
from .incidents import IncidentGrouper
from .grid import GridCounts, GridCursor, grid_origin, infer_interval_s
from .readings import Reading
from .rules import AlarmLimits, FeedMonitor, MonitorConfig, per_point_rate
from .seasonality import CalendarTerms
from .refit import RefitRequest, RingBuffer, thresholds_for
from .spec import ModelSpec

STATES = ("learning", "fitting", "watching")


def _utc(epoch_s: float) -> datetime:
    return datetime.fromtimestamp(float(epoch_s), tz=timezone.utc)


@dataclass
class _Pending:
    kind: str  # "initial" or "refit"
    request: RefitRequest
    window_end_slot: int
    buffer: list = field(default_factory=list)
    offset_at_request: float = 0.0
    last_seen: datetime | None = None
    full_selection: bool = True


class FeedLifecycle:
    """The lifecycle of one feed (see the module docstring)."""

    # slots: a dict of 40 attributes takes 1.5 KB in every feed
    __slots__ = ("feed_id", "settings", "state", "cursor", "counter", "raw_epochs", "raw_values", "raw_real",
                 "raw_span", "window", "window_start", "window_valid", "next_learning_check", "_replaying_raw",
                 "next_slot", "history", "pending", "monitor", "thresholds", "thresholds_config", "model_version",
                 "model_label", "model_reason", "fitted_at", "fitted_spec", "fitted_calendar", "fit_problems",
                 "next_refit_epoch_s", "diagnostics", "last_diag_refit_slot", "refit_due", "last_refit_error",
                 "request_seq", "readings", "rejects", "last_time", "last_value", "last_seen", "meter_resets",
                 "incidents", "_quiet_plan")

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
        # the learning readings before the grid exists, as two float arrays (16 bytes a reading);
        # a reading's time is its epoch again when it is placed (the same instant, in UTC)
        self.raw_epochs = array("d")
        self.raw_values = array("d")
        self.raw_real = 0
        self.raw_span = (math.inf, -math.inf)
        self.window = array("d")  # the learning window on the grid, NaN for a missing slot
        self.window_start = 0
        self.window_valid = 0
        self.next_learning_check = settings.min_train_points
        self._replaying_raw = False
        self.next_slot = 0
        self.history = RingBuffer(settings.refit_window_points, dtype=np.float32)
        self.pending: _Pending | None = None
        self.monitor: FeedMonitor | None = None
        self.thresholds: AlarmLimits | None = None
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
        self.incidents = IncidentGrouper()
        self._quiet_plan: tuple[Any, Any] | None = None  # (monitor, its plan): quiet_run.covered_plan

    # ------------------------------------------------------------- incidents
    def tag_events(self, out: EngineOutput) -> EngineOutput:
        """Give every event of ``out`` its ``incident_start`` (:mod:`.incidents`), in order.

        The gap that still joins an event to the incident before it is
        ``incident_gap_slots`` grid intervals (zero before the grid exists:
        only ``meter_reset`` can happen then, and it stands alone).
        """
        if out.events:  # the gap is read only when an event is tagged
            if self.cursor is not None:
                self.incidents.gap = timedelta(seconds=self.settings.incident_gap_slots * self.cursor.interval_s)
            out.events[:] = [self.incidents.tag(ev) for ev in out.events]
        return out

    # ------------------------------------------------------------- helpers
    def slot_epoch(self, slot: int) -> float:
        return self.cursor.slot_time(slot)

    def _has_range(self) -> bool:
        m = self.settings.monitor
        return m.range_low is not None or m.range_high is not None

    def monitor_config(self, thresholds: AlarmLimits) -> MonitorConfig:
        return replace(self.settings.monitor, thresholds=thresholds, interval_s=self.cursor.interval_s)

    def at_last_slot(self) -> datetime:
        return _utc(self.slot_epoch(max(self.next_slot - 1, 0)))

    # -------------------------------------------------------------- readings
    def process(self, reading: Reading, clock: datetime | None) -> EngineOutput:
        return self.tag_events(self._process(reading, clock))

    def _process(self, reading: Reading, clock: datetime | None) -> EngineOutput:
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
        return self.tag_events(self._tick(now, out))

    def _tick(self, now: datetime, out: EngineOutput) -> EngineOutput:
        if self.state == "watching" and self.monitor is not None:
            out.events.extend(self.monitor.tick(now))
        return out

    def _learn_raw(self, epoch: float, value: float, ts: datetime, out: EngineOutput) -> None:
        """Before the grid exists: keep the reading; put the window on a grid once it is full."""
        self.raw_epochs.append(epoch)
        self.raw_values.append(value)
        self.last_time, self.last_value = ts, value
        if math.isfinite(value):
            self.raw_real += 1
        self.raw_span = (min(self.raw_span[0], epoch), max(self.raw_span[1], epoch))
        s = self.settings
        if self.raw_real < self.next_learning_check:
            return
        if not (self.raw_real >= s.train_points or self.raw_span[1] - self.raw_span[0] >= s.train_span_s):
            return
        epochs = np.frombuffer(self.raw_epochs, dtype=float).copy()
        distinct = np.unique(epochs)
        if distinct.size < 2:
            self.next_learning_check = self.raw_real + 1
            return
        interval = s.interval_s if s.interval_s is not None else infer_interval_s(distinct)
        self.cursor = GridCursor(grid_origin(epochs, interval), interval, s.grid_tolerance)
        values = self.raw_values
        self.raw_epochs, self.raw_values = array("d"), array("d")
        order = np.argsort(epochs, kind="stable")
        if self.counter is None:  # in time order on the new grid at once, as _place one by one
            values = np.asarray(values, dtype=float)[order]
            slots = self.cursor.place_sorted(epochs[order])
            placed = slots >= 0
            if placed.any():  # the slots between placed readings are missing (NaN)
                window = np.full(int(slots[placed][-1]) + 1, np.nan)
                window[slots[placed]] = values[placed]
                self.window, self.next_slot = array("d", window.tobytes()), window.size
                self.window_valid = int(np.count_nonzero(np.isfinite(values[placed])))
                seen = np.flatnonzero(placed & ~np.isnan(values))
                self.last_seen = _utc(epochs[order][seen[-1]]) if seen.size else self.last_seen
        else:
            self._replaying_raw = True
            try:
                times = epochs.tolist()
                for i in order.tolist():
                    self._place(times[i], values[i], _utc(times[i]), out)
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
                out.events.append(self.counter.reset_event(self.feed_id, step, ts, self.model_version))
            value = step.delta
        self._slot(value, ts, out)

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
        step = self.monitor.process(value, ts)
        if self.counter is not None:  # what a counter feed's rules score is an interval delta, not a reading
            out.events.extend(replace(ev, detail="interval delta" + ev.detail[len("reading"):])
                              if ev.detail.startswith("reading") else ev for ev in step.events)
        else:
            out.events.extend(step.events)
        inn = step.innovation
        out.innovations.append((self.feed_id, inn))
        # the refit window holds readings on the current model's base level (see _request_refit)
        model_value = inn.value - step.level_offset if inn.absorbed else math.nan
        self.history.append(model_value)
        if self.pending is not None:
            self.pending.buffer.append(model_value)
        if step.reanchored or step.episodes_open:
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
        at = self.at_last_slot()
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
                thresholds: AlarmLimits | dict[str, Any] | None, request: RefitRequest | None) -> EngineOutput:
        return self.tag_events(self._install(fitted, model_version, reason, thresholds, request))

    def _install(self, fitted: FittedModel, model_version: int, reason: str,
                 thresholds: AlarmLimits | dict[str, Any] | None, request: RefitRequest | None) -> EngineOutput:
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
        th = AlarmLimits.of(thresholds) if thresholds is not None else thresholds_for(fitted, p.request)
        stream = fitted.stream(level=self.settings.level, model_version=model_version)
        config = self.monitor_config(th)
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
            self.monitor = FeedMonitor(self.feed_id, stream, config, last_seen=p.last_seen,
                                       recent_readings=p.request.values)
            self.history = RingBuffer(self.settings.refit_window_points, p.request.values, dtype=np.float32)
            self.window, self.window_valid = array("d"), 0
            self.state = "watching"
            out.state_changes.append(StateChange(
                self.feed_id, "fitting", "watching", self.at_last_slot(),
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
        monitor = FeedMonitor(self.feed_id, stream, config, last_seen=self.last_seen)
        when = self.at_last_slot()
        out.events.extend(monitor.carry_over(old, when))
        self.monitor = monitor
        out.state_changes.append(StateChange(
            self.feed_id, "watching", "watching", when,
            f"model version {model_version} ({self.model_label}) replaced version {old_version} ({old_label}): "
            f"{reason}; {len(p.buffer)} readings since the request replayed"))
        return out

    def accept_level(self, at: datetime, by: str, note: str) -> EngineOutput:
        """Close the open level-shift episode: the present level is the new normal (:meth:`FeedMonitor.accept_level`)."""
        if self.monitor is None or not self.monitor.level_episode_open:
            raise DataError(f"feed {self.feed_id!r} has no open level-shift episode to accept")
        return self.tag_events(EngineOutput(events=self.monitor.accept_level(at, by, note)))

    def refit_failed(self, error: str) -> EngineOutput:
        p = self.pending
        if p is None:
            raise DataError(f"feed {self.feed_id!r}: no refit is pending")
        self.pending = None
        out = EngineOutput()
        at = self.at_last_slot()
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
            "threshold_mode": None if self.thresholds is None else self.thresholds.mode,
            "diagnostics": self.diagnostics.last,
        }
        if self.state == "learning":
            have = self.raw_real if self.cursor is None else self.window_valid
            out["learning"] = {"readings": have, "train_points": self.settings.train_points,
                               "min_train_points": self.settings.min_train_points}
        if self.counter is not None:
            out["counter"] = {**self.counter.counts, "meter_resets": self.meter_resets}
        return out
