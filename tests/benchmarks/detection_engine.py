"""Driving leadline's Engine the way the live service does, for bench_detection.py.

One feed per family learns and is fitted through :class:`Engine` (learning ->
fitting -> watching, the refit requests run inline with
``run_refit_with_thresholds`` and installed with ``install_model``). Its
checkpoint is then restored into a fresh engine for every trial, so each
trial continues the same feed from the end of the training window exactly as
a restarted service would; scheduled and diagnostics refits requested during
a trial are run and installed inline too.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from datetime import datetime, timedelta

import numpy as np

from leadline.detector.engine import Engine, FeedSettings, run_refit_with_thresholds
from leadline.detector.errors import FitError
from leadline.detector.readings import Reading

FEED = "bench"
#: Events whose active spans overlap or come within this many readings form one incident.
INCIDENT_GAP = 3


@dataclass
class Span:
    """One event (episode) of one rule: [start, end) in readings of the run; end None = still open."""

    rule: str
    severity: str
    start: int
    end: int | None = None


@dataclass
class RunResult:
    spans: list[Span]
    n: int
    refits: int = 0
    refit_s: float = 0.0

    def starts(self) -> np.ndarray:
        return np.array(sorted(s.start for s in self.spans), dtype=int)

    def closed(self) -> list[tuple[int, int]]:
        """Active spans as [start, end) with open ones running to the end of the run."""
        return [(s.start, self.n if s.end is None else max(s.end, s.start + 1)) for s in self.spans]

    def incidents(self) -> list[tuple[int, int]]:
        """Maximal groups of events whose active spans overlap or touch within INCIDENT_GAP readings."""
        out: list[list[int]] = []
        for a, b in sorted(self.closed()):
            if out and a <= out[-1][1] + INCIDENT_GAP:
                out[-1][1] = max(out[-1][1], b)
            else:
                out.append([a, b])
        return [(a, b) for a, b in out]

    def active(self) -> np.ndarray:
        """Per reading: is any event active after this reading was processed."""
        flags = np.zeros(self.n, dtype=bool)
        for a, b in self.closed():
            flags[max(a, 0):max(b, 0)] = True
        return flags


@dataclass
class Learned:
    checkpoint: bytes
    version: int
    model: str
    thresholds_mode: str | None
    learn_readings: int
    fit_s: float
    spans_while_learning: int = 0
    status: dict = field(default_factory=dict)


class EngineDriver:
    """One family's feed: learn and fit once, then run trials from the checkpoint."""

    def __init__(self, settings: FeedSettings, interval_s: float, start: datetime) -> None:
        self.settings = settings
        self.interval = timedelta(seconds=interval_s)
        self.start = start
        self.version = 0

    def _settings_for(self, feed_id: str) -> FeedSettings:
        return self.settings

    def _serve(self, engine: Engine, out, log: dict) -> None:
        """Run every refit request inline and install it (repeatedly: an install may request again)."""
        pending = list(out.refit_requests)
        events = list(out.events)
        while pending:
            req = pending.pop(0)
            t0 = time.perf_counter()
            try:
                fitted, th = run_refit_with_thresholds(req)
            except FitError as exc:
                more = engine.refit_failed(req.feed_id, str(exc))
            else:
                self.version += 1
                more = engine.install_model(req.feed_id, fitted, self.version, req.reason, thresholds=th, request=req)
            log["refit_s"] += time.perf_counter() - t0
            log["refits"] += 1
            events.extend(more.events)
            pending.extend(more.refit_requests)
        log["events"].extend(events)

    def run(self, values: np.ndarray, first_slot: int,
            learned: "Learned | None" = None) -> tuple[RunResult, Engine]:
        """Feed ``values`` (slots first_slot, first_slot + 1, ...) to an engine, restored from ``learned`` if given."""
        engine = Engine(self._settings_for)
        if learned is not None:
            engine.restore(FEED, learned.checkpoint, learned.version)
        log = {"events": [], "refits": 0, "refit_s": 0.0}
        base_ts = self.start + self.interval * first_slot
        spans: dict[tuple[str, datetime], Span] = {}
        step_s = self.interval.total_seconds()
        for i, v in enumerate(values):
            ts = base_ts + self.interval * i
            out = engine.process(Reading(FEED, ts, float(v)))
            out.extend(engine.tick(ts))
            if out.refit_requests:
                self._serve(engine, out, log)
            else:
                log["events"].extend(out.events)
            for ev in log["events"]:
                key = (ev.rule, ev.start)
                start_i = int(round((ev.start - base_ts).total_seconds() / step_s))
                span = spans.get(key)
                if span is None:
                    span = spans[key] = Span(ev.rule, ev.severity, start_i)
                span.severity = ev.severity
                if ev.end is not None:
                    span.end = int(round((ev.end - base_ts).total_seconds() / step_s))
            log["events"].clear()
        result = RunResult(list(spans.values()), len(values), log["refits"], log["refit_s"])
        return result, engine

    def learn(self, sim, rng: np.random.Generator):
        """Feed the family from slot 0 until the engine watches; returns (Learned, simulator history)."""
        s = self.settings
        n = min(s.train_points, int(math.ceil(s.train_span_s / self.interval.total_seconds())) + 1)
        history = sim.start()
        piece = sim.run(n, rng, history)
        t0 = time.perf_counter()
        result, engine = self.run(sim.readings(piece), 0)
        history = piece.history
        while engine.state_of(FEED) != "watching":  # learning ends a little later than estimated
            more = sim.run(1, rng, history)
            history = more.history
            out = engine.process(Reading(FEED, self.start + self.interval * more.slot,
                                         float(sim.readings(more)[0])))
            self._serve(engine, out, {"events": [], "refits": 0, "refit_s": 0.0})
        fit_s = time.perf_counter() - t0
        status = engine.status()[0]
        learned = Learned(engine.checkpoint(FEED), self.version, status.get("model") or "?",
                          status.get("threshold_mode"), history.slot, fit_s, len(result.spans), status)
        return learned, history
