"""Drive the real engine over a group of feeds on reading time, refits inline.

:func:`replay_group` is what one worker does: the readings of its feeds
merged on time go through :class:`~leadline.detector.engine.Engine` exactly
as the service feeds them, with two differences that make a replay
deterministic and quick:

* the clock is reading time: the engine is ticked each time the newest
  reading time moves forward (the stale rule sees the gaps of history);
* every refit request is fitted at once, in this process, and its model
  installed before the next reading (the same way for every run), so
  scheduled refits happen at the live cadence of reading time.

By default the group goes feed by feed (:class:`_FeedByFeed`): a watching
feed's quiet stretches are taken at once by
:func:`~leadline.detector.quiet_run.advance_quiet` and a learning feed's
readings by :func:`~leadline.detector.quiet_run.learn_quiet`, both leaving
the feed exactly as the readings one by one would, and every other reading
goes through ``Engine.process`` with the ticks that can change the feed.
``fast=False`` keeps the merged, reading-by-reading replay, the reference
that ``tests/test_quiet_run.py`` holds the fast path to (events, models and
evidence equal).

The model versions are numbered per feed from 1, as a fresh store numbers
them; :mod:`.writer` maps them to the store's numbers. The result holds
plain data only (events, model records, evidence records), so a process
pool or a Dask cluster can send it back.
"""

from __future__ import annotations

import json
import logging
import os
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any, Callable, Iterable, Mapping

import numpy as np

from leadline.detector.engine import Engine, FeedSettings, run_refit_with_thresholds
from leadline.detector.events import AlarmEvent
from leadline.detector.evidence import EvidenceRecord, EvidenceRecorder
from leadline.detector.quiet_run import MAX_RUN, advance_quiet, learn_quiet
from leadline.detector.readings import Reading

from ..store.coltypes import dumps_json
from .history import FeedHistory, readings_of

__all__ = ["ReplayedFit", "GroupResult", "replay_group", "single_blas_thread"]

logger = logging.getLogger("leadline.replay")


@dataclass(frozen=True)
class ReplayedFit:
    """One fit installed during a replay, as :meth:`EventStore.record_model` takes it (its
    ``local_version`` numbered within the replay, remapped to the store's when written).

    The parameters, limits and fit statistics are kept as compact JSON text
    (a feed refitted daily has 30 of these a month, kept until the store is
    written) and read back by the properties of the same names.
    """

    feed_id: str
    local_version: int
    order: str
    parameters_json: str
    thresholds_json: str
    fit_stats_json: str
    fitted_at: datetime
    window_start: datetime
    window_end: datetime
    reason: str

    @property
    def parameters(self) -> dict[str, Any]:
        return json.loads(self.parameters_json)

    @property
    def thresholds(self) -> dict[str, Any]:
        return json.loads(self.thresholds_json)

    @property
    def fit_stats(self) -> dict[str, Any]:
        return json.loads(self.fit_stats_json)


def _compact(value: Any) -> str:
    return dumps_json(value)  # as the store will write it: numpy scalars and times made plain


@dataclass
class GroupResult:
    """What one group of feeds produced, in the order it was produced."""

    feeds: list[str]
    readings: int = 0
    quiet_readings: int = 0  # of which taken in quiet runs (the fast path)
    events: list[AlarmEvent] = field(default_factory=list)
    models: list[ReplayedFit] = field(default_factory=list)
    evidence: list[EvidenceRecord] = field(default_factory=list)
    failed_fits: int = 0


def single_blas_thread() -> None:
    """One BLAS thread in this process (set before numpy loads in a spawned worker)."""
    for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(name, "1")


def _utc(epoch_s: float) -> datetime:
    return datetime.fromtimestamp(float(epoch_s), tz=timezone.utc)


class _GroupReplay:
    def __init__(self, settings: Mapping[str, FeedSettings], refit: Callable[[Any], Any]) -> None:
        self.engine = Engine(lambda feed_id: settings[feed_id])
        self.evidence = EvidenceRecorder()
        self.refit = refit
        self.versions: dict[str, int] = {}
        self.clock: datetime | None = None
        self.result: GroupResult | None = None

    def handle(self, out: Any, reading: Any = None) -> None:
        result = self.result
        result.evidence.extend(self.evidence.observe(out, reading))
        result.events.extend(out.events)
        for request in out.refit_requests:
            self.fit(request)

    def fit(self, request: Any) -> None:
        try:
            fitted, thresholds = self.refit(request)
        except Exception as exc:  # noqa: BLE001 - as the service: the feed goes on with its old model
            logger.warning("refit failed feed=%s reason=%s error=%s: %s", request.feed_id, request.reason,
                           type(exc).__name__, exc)
            self.result.failed_fits += 1
            self.handle(self.engine.refit_failed(request.feed_id, str(exc)))
            return
        version = self.versions.get(request.feed_id, 0) + 1
        self.versions[request.feed_id] = version
        self.result.models.append(ReplayedFit(
            request.feed_id, version, fitted.spec.label, _compact(fitted.params), _compact(thresholds),
            _compact(fitted.summary()),
            self.clock, _utc(request.epoch_s[0]), _utc(request.epoch_s[-1]), request.reason))
        self.handle(self.engine.install_model(request.feed_id, fitted, version, request.reason,
                                              thresholds=thresholds, request=request))

    def run(self, feeds: Iterable[FeedHistory], on_progress: Callable[[int], None] | None = None,
            every: int = 100_000) -> GroupResult:
        """The group's readings merged on time, each through :meth:`Engine.process` (the reference path)."""
        feeds = list(feeds)
        self.result = GroupResult([f.feed_id for f in feeds])
        engine = self.engine
        for reading in readings_of(feeds):
            if self.clock is None or reading.timestamp > self.clock:
                if self.clock is not None:
                    self.handle(engine.tick(self.clock))
                self.clock = reading.timestamp
            self.handle(engine.process(reading), reading)
            self.result.readings += 1
            if on_progress is not None and self.result.readings % every == 0:
                on_progress(self.result.readings)
        if self.clock is not None:
            self.handle(engine.tick(self.clock))
        self.result.evidence.extend(self.evidence.partial())
        return self.result


def _reading_times(feeds: list[FeedHistory]) -> np.ndarray:
    """The group's distinct reading times, sorted (the merged replay's clock ticks), built feed by
    feed: feeds on one clock add nothing, and no array of all the group's readings is made."""
    times = np.empty(0)
    for feed in feeds:
        epochs = feed.epoch_s
        if not (epochs.size == times.size and np.array_equal(epochs, times)):
            times = np.union1d(times, epochs)
    return times


class _FeedByFeed(_GroupReplay):
    """The same replay, one feed after another, quiet runs taken at once (:mod:`~leadline.detector.quiet_run`).

    A feed's engine sees the same readings and the same clock ticks as in
    the merged replay: the group's distinct reading times, each ticked once
    the time has moved past it. Between two readings of a feed only the ticks
    that can change it are given to it: all of them when the feed's stale
    limit falls among them, else the last one (which leaves the stale rule's
    clock where all of them would). Inside a quiet run the ticks are skipped
    and the last one is given after it, which cannot raise anything there
    (the run's readings are closer together than the stale limit).
    """

    def __init__(self, settings: Mapping[str, FeedSettings], refit: Callable[[Any], Any]) -> None:
        super().__init__(settings, refit)
        self.settings = settings
        self.next_progress = 0

    def run(self, feeds: Iterable[FeedHistory], on_progress: Callable[[int], None] | None = None,
            every: int = 100_000) -> GroupResult:
        feeds = list(feeds)
        self.result = GroupResult([f.feed_id for f in feeds])
        times = _reading_times(feeds)
        self.next_progress = every
        for feed in feeds:
            self.engine = Engine(lambda feed_id: self.settings[feed_id])
            self._feed(feed, times, on_progress, every)
        self.result.evidence.extend(self.evidence.partial())
        return self.result

    def _ticks(self, times: np.ndarray, feed_id: str) -> None:
        """Give the feed the ticks ``times`` (increasing): all, or the last (see the class docstring)."""
        if times.size == 0:
            return
        engine = self.engine
        lifecycle = engine.lifecycle_of(feed_id)
        watching = lifecycle is not None and lifecycle.state == "watching" and lifecycle.monitor is not None
        stale = lifecycle.monitor.stale if watching else None
        due = None if stale is None else stale.due()
        if due is not None and times[-1] >= due.timestamp() - 1e-3:
            for epoch in times.tolist():
                self.handle(engine.tick(_utc(epoch)))
        else:
            self.handle(engine.tick(_utc(times[-1])))

    def _feed(self, feed: FeedHistory, times: np.ndarray, on_progress: Callable[[int], None] | None,
              every: int) -> None:
        epochs, values, feed_id = feed.epoch_s, feed.values, feed.feed_id
        n = epochs.size
        if n == 0:
            return
        # the ticks before each reading: times[first[i]:last[i] + 1] are in [epochs[i - 1], epochs[i])
        last_tick = np.searchsorted(times, epochs, side="left") - 1
        first_tick = np.concatenate([[0], np.searchsorted(times, epochs[:-1], side="left")])
        clock = np.where(last_tick >= 0, times[np.maximum(last_tick, 0)], np.nan)
        engine = self.engine
        result = self.result
        epoch_list = epochs.tolist()
        value_list = values.tolist()
        i = 0
        while i < n:
            if last_tick[i] >= first_tick[i]:
                if i == 0:
                    self.handle(engine.tick(_utc(times[last_tick[0]])))  # the engine's clock; no feed yet
                else:
                    self._ticks(times[first_tick[i]:last_tick[i] + 1], feed_id)
            lifecycle = engine.lifecycle_of(feed_id)
            run = None if lifecycle is None else advance_quiet(
                lifecycle, epochs[i:i + MAX_RUN], values[i:i + MAX_RUN], clock[i:i + MAX_RUN])
            if run is not None:
                # the last tick among the run's readings came before its last reading and what that asked
                inside = times[first_tick[i + 1]:last_tick[i + run.count - 1] + 1] if run.count > 1 else times[:0]
                if inside.size:
                    self.handle(engine.tick(_utc(inside[-1])))
                self.clock = _utc(epoch_list[i + run.count - 1])
                result.evidence.extend(self.evidence.slots(feed_id, run.rows))
                self.handle(run.output)
                i += run.count
                result.readings += run.count
                result.quiet_readings += run.count
            elif lifecycle is not None and (learnt := learn_quiet(
                    lifecycle, epochs[i:i + MAX_RUN], values[i:i + MAX_RUN], clock[i:i + MAX_RUN])):
                self.clock = _utc(epoch_list[i + learnt - 1])
                inside = times[first_tick[i + 1]:last_tick[i + learnt - 1] + 1] if learnt > 1 else times[:0]
                if inside.size:
                    self.handle(engine.tick(_utc(inside[-1])))
                i += learnt
                result.readings += learnt
            else:
                reading = Reading(feed_id, _utc(epoch_list[i]), value_list[i])
                self.clock = reading.timestamp
                self.handle(engine.process(reading), reading)
                i += 1
                result.readings += 1
            if on_progress is not None and result.readings >= self.next_progress:
                on_progress(result.readings)
                self.next_progress += every
        self._ticks(times[np.searchsorted(times, epochs[-1], side="left"):], feed_id)


def replay_group(feeds: Iterable[FeedHistory], settings: Mapping[str, FeedSettings],
                 refit: Callable[[Any], Any] | None = None,
                 on_progress: Callable[[int], None] | None = None, fast: bool = True) -> GroupResult:
    """Replay one group of feeds; see the module's docstring.

    Parameters
    ----------
    feeds : iterable of FeedHistory
    settings : mapping of feed id -> FeedSettings
        Each feed's settings (built from the config by the caller).
    refit : callable, optional
        ``refit(request) -> (FittedModel, thresholds JSON)``; default
        :func:`~leadline.detector.engine.run_refit_with_thresholds`.
    on_progress : callable, optional
        Called with the readings replayed so far, about every 100,000 readings.
    fast : bool
        Feed by feed with quiet runs (default), or every reading through
        the engine in merged time order (the reference path).
    """
    kind = _FeedByFeed if fast else _GroupReplay
    return kind(settings, refit or run_refit_with_thresholds).run(feeds, on_progress)
