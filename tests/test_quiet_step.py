"""The live quiet step against the per-reading engine: the same outputs, the same states.

The invented Brackenholt district of ``test_quiet_run`` (eight feeds, each with
a fault for the rules to find, gaps, late and off-grid readings, a daily
cycle with calendar terms, a change of dynamics) is fed reading by reading
to two engines, as a live service feeds it: one takes quiet readings by
:func:`~leadline.detector.quiet_step.step_quiet`, the reference runs every
reading through the whole per-reading path (statsmodels fits both engines'
models). Every output must be equal, innovation for innovation and event for
event, and every feed's checkpoint byte for byte.
"""

from __future__ import annotations

from dataclasses import asdict, replace
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from leadline.detector.engine import Engine, run_refit_with_thresholds
from leadline.detector.feed_settings import FeedSettings
from leadline.detector.readings import Reading
from leadline.detector.rules import MonitorConfig
from leadline.detector.spec import ModelSpec
from test_quiet_run import INTERVAL_S, site


@pytest.fixture(scope="module")
def brackenholt():
    return site()


def _run(feeds, settings, quiet: bool, clock_lag_s: float | None, checkpoint_every: int):
    """All feeds through one engine, in time order; per reading its output, and the checkpoints."""
    engine = Engine(lambda feed_id: settings[feed_id], quiet_steps=quiet)
    readings = sorted(((e, h.feed_id, v) for h in feeds for e, v in zip(h.epoch_s.tolist(), h.values.tolist())),
                      key=lambda r: r[0])
    outputs, states, versions = [], {}, {}
    for i, (epoch, feed_id, value) in enumerate(readings):
        when = datetime.fromtimestamp(epoch, tz=timezone.utc)
        if clock_lag_s is not None and i % 7 == 0:
            engine.tick(when - timedelta(seconds=clock_lag_s))
        out = engine.process(Reading(feed_id, when, value))
        outputs.append((
            [asdict(ev) for ev in out.events],
            [asdict(change) for change in out.state_changes],
            [(request.feed_id, request.reason) for request in out.refit_requests],
            [(fid, asdict(inn)) for fid, inn in out.innovations],
        ))
        for request in out.refit_requests:
            fitted, thresholds = run_refit_with_thresholds(request)
            versions[feed_id] = versions.get(feed_id, 0) + 1
            engine.install_model(feed_id, fitted, versions[feed_id], request.reason, thresholds, request)
        if i % checkpoint_every == 0 and engine.state_of(feed_id) == "watching":
            states[i] = (feed_id, engine.checkpoint(feed_id))
    return outputs, states, engine


@pytest.mark.parametrize("clock_lag_s", [None, 120.0])
def test_quiet_steps_give_the_outputs_and_states_of_the_per_reading_engine(brackenholt, clock_lag_s):
    feeds, settings = brackenholt
    quick, quick_states, engine = _run(feeds, settings, True, clock_lag_s, 53)
    slow, slow_states, reference = _run(feeds, settings, False, clock_lag_s, 53)
    total = sum(h.epoch_s.size for h in feeds)
    assert reference.quiet_readings == 0
    # the learning windows (300 of 1,600 readings a feed), the episodes and the gaps go the long way
    assert engine.quiet_readings > 0.6 * total, engine.quiet_readings
    rules = {event["rule"] for events, _, _, _ in slow for event in events}
    assert {"spike", "cusum", "flatline", "noise_burst", "range", "stale"} <= rules, rules
    assert len(quick) == len(slow) == total
    for i, (a, b) in enumerate(zip(quick, slow)):
        assert a == b, f"reading {i}: outputs differ"
    assert quick_states.keys() == slow_states.keys() and len(quick_states) > 100
    for i, state in slow_states.items():
        assert quick_states[i] == state, f"checkpoint of {state[0]} differs after reading {i}"
    for history in feeds:
        assert engine.checkpoint(history.feed_id) == reference.checkpoint(history.feed_id)


def test_a_feed_with_an_uncovered_rule_takes_the_per_reading_path(brackenholt):
    feeds, settings = brackenholt
    history = feeds[0]
    ewma = {history.feed_id: replace(settings[history.feed_id], sigma_limits={"ewma_lam": 0.2})}
    outputs, _, engine = _run([history], ewma, True, None, 10**9)
    assert engine.quiet_readings == 0
    slow, _, reference = _run([history], ewma, False, None, 10**9)
    assert outputs == slow and engine.checkpoint(history.feed_id) == reference.checkpoint(history.feed_id)


def test_readings_that_are_not_quiet_are_left_alone():
    # white noise, sigma limits: from one saved state, each case is the feed's next reading in an
    # engine of its own, so each is kept from the quiet step by its own condition alone: a reading
    # at 6 sigma (a spike), one just beyond the range (a range alarm at a z no other rule minds),
    # one off the grid, one late
    rng = np.random.default_rng(31)
    start = datetime(2026, 5, 4, tzinfo=timezone.utc)
    settings = FeedSettings(spec=ModelSpec.white_noise(), interval_s=INTERVAL_S, train_points=100,
                            min_train_points=50, refit_every_s=None, threshold_mode="sigma",
                            monitor=MonitorConfig(range_low=-3.0, range_high=10.0))
    feed_id = "brackenholt/t"
    engine = Engine(lambda _: settings)
    for k, value in enumerate(np.clip(rng.standard_normal(300), -2.5, 2.5)):
        out = engine.process(Reading(feed_id, start + timedelta(seconds=k * INTERVAL_S), float(value)))
        for request in out.refit_requests:
            fitted, thresholds = run_refit_with_thresholds(request)
            engine.install_model(feed_id, fitted, 1, request.reason, thresholds, request)
    assert engine.state_of(feed_id) == "watching"
    saved = engine.checkpoint(feed_id)

    def next_reading(slot: float, value: float) -> tuple[int, list[str]]:
        fresh = Engine(lambda _: settings)
        fresh.restore(feed_id, saved, 1)
        fresh.tick(start + timedelta(seconds=299 * INTERVAL_S))  # delivers the restore's output
        out = fresh.process(Reading(feed_id, start + timedelta(seconds=slot * INTERVAL_S), value))
        return fresh.quiet_readings, [event.rule for event in out.events]

    assert next_reading(300, 0.1) == (1, [])  # the control: a plain next reading is quiet
    assert next_reading(300, 6.0) == (0, ["spike"])
    assert next_reading(300, -3.05) == (0, ["range"])  # beyond the range, its z inside every limit
    assert next_reading(300.4, 0.1) == (0, [])  # off the grid
    assert next_reading(299, 0.2) == (0, [])  # late: the slot was taken


def test_the_engines_counts_are_those_of_its_status(brackenholt):
    # Engine.counts (the service's periodic summary) against the full status of every feed,
    # with episodes open part of the way through the district's faults
    feeds, settings = brackenholt
    engine = Engine(lambda feed_id: settings[feed_id])
    readings = sorted(((e, h.feed_id, v) for h in feeds for e, v in zip(h.epoch_s.tolist(), h.values.tolist())),
                      key=lambda r: r[0])
    seen_open = False
    for i, (epoch, feed_id, value) in enumerate(readings[:8 * 900]):
        out = engine.process(Reading(feed_id, datetime.fromtimestamp(epoch, tz=timezone.utc), value))
        for request in out.refit_requests:
            fitted, thresholds = run_refit_with_thresholds(request)
            engine.install_model(feed_id, fitted, 1 + i, request.reason, thresholds, request)
        if i % 211 == 0:
            status = engine.status()
            active = sum(len(s["active_alarms"]) for s in status)
            assert engine.counts() == (len(status), active)
            seen_open = seen_open or active > 0
    assert seen_open
