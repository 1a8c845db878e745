"""The bulk forms the quiet runs use give the states of their one-at-a-time forms, bit for bit.

Each bulk method (rings, the re-anchoring history, the level condition, the
on-delay window, the grid cursor, the evidence ring, the noise-burst window)
is fed the same values as its one-at-a-time form, in chunks of random
sizes that wrap the rings several times, and the kept values are compared
exactly. (The whole quiet run against the per-reading engine is
``tests/test_quiet_run.py``.)
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from leadline.detector.evidence import EvidenceRecorder
from leadline.detector.events import AlarmEvent
from leadline.detector.grid import GridCursor
from leadline.detector.innovation import Innovation
from leadline.detector.ring import RingBuffer
from leadline.detector.rules.level_condition import LevelCondition
from leadline.detector.rules.lifecycle import AlarmLifecycle, Assessment, LifecycleConfig
from leadline.detector.rules.noise_burst import NoiseBurstRule
from leadline.detector.rules.step_history import StepHistory


def _chunks(values: np.ndarray, seed: int):
    rng = np.random.default_rng(seed)
    i = 0
    while i < values.size:
        size = int(rng.integers(1, 60))
        yield values[i:i + size]
        i += size


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("lead_nan", [False, True])
def test_ring_extend_equals_append(dtype, lead_nan):
    values = np.random.default_rng(1).normal(5.0, 2.0, 700)
    if lead_nan:
        values[:3] = np.nan  # a float32 ring takes its reference from the first finite value
    values[100:104] = np.nan
    one, bulk = RingBuffer(97, dtype=dtype), RingBuffer(97, dtype=dtype)
    for chunk in _chunks(values, 2):
        for value in chunk.tolist():
            one.append(value)
        bulk.extend(chunk)
        assert len(bulk) == len(one)
        assert np.array_equal(bulk.stored(), one.stored(), equal_nan=True)
        assert bulk.saved_reference == one.saved_reference


def test_step_history_extend_equals_append():
    z = np.random.default_rng(3).normal(size=500)
    one, bulk = StepHistory(128), StepHistory(128)
    for chunk in _chunks(z, 4):
        for value in chunk.tolist():
            one.append(value, 0.25, True)
        bulk.extend(chunk, 0.25, True)
        assert bulk.rows() == one.rows()


def test_level_condition_observe_many_equals_observe():
    values = np.random.default_rng(5).normal(10.0, 1.0, 400)
    one, bulk = LevelCondition(), LevelCondition()
    for chunk in _chunks(values, 6):
        for value in chunk.tolist():
            one.observe(value)
        bulk.observe_many(chunk)
        assert bulk.state_dict() == one.state_dict()


def test_quiet_lifecycle_steps_equal_single_steps():
    when = datetime(2026, 5, 4, tzinfo=timezone.utc)
    config = LifecycleConfig(2, 5, 1)
    one, bulk = AlarmLifecycle("f", "spike", {}, config), AlarmLifecycle("f", "spike", {}, config)
    for life in (one, bulk):
        life.step(Assessment("warning", False, 4.0), when)  # one abnormal step pending in the window
    assert one.state_dict() == bulk.state_dict() and one.state == "pending"
    for steps in (1, 2, 3, 7):
        for _ in range(steps):
            one.step(Assessment(None, True, 0.5), when)
        bulk.pass_quiet(steps)
        assert bulk.state_dict() == one.state_dict()


def test_grid_run_equals_place():
    origin, interval = 1_780_000_000.0, 60.0
    rng = np.random.default_rng(7)
    epochs = origin + interval * np.arange(300) + rng.uniform(-14.0, 14.0, 300)  # within the tolerance
    epochs[200] += 30.0  # off the grid: the run stops before it
    one, bulk = GridCursor(origin, interval), GridCursor(origin, interval)
    count = bulk.run_length(epochs)
    assert count == 200
    bulk.place_run(epochs[:count])
    for epoch in epochs[:count].tolist():
        one.place(epoch)
    assert (bulk.next_slot, bulk.counts.as_dict()) == (one.next_slot, one.counts.as_dict())


def test_evidence_slots_equal_slot_by_slot():
    start = datetime(2026, 5, 4, tzinfo=timezone.utc)
    rows = np.column_stack([start.timestamp() + 60.0 * np.arange(400), np.random.default_rng(8).normal(size=(400, 4))])
    one, bulk = EvidenceRecorder(), EvidenceRecorder()
    for chunk in _chunks(rows[:300], 9):
        for row in chunk.tolist():
            one.slot("f", *row)
        bulk.slots("f", chunk)
    onset = start + timedelta(minutes=300)
    event = AlarmEvent(feed_id="f", rule="spike", severity="alarm", start=onset, end=onset + timedelta(minutes=5),
                       value_at_onset=1.0, parameters={}, model_version=1, detail="")
    records = one.event(event), bulk.event(event)
    assert records == ([], [])  # open, waiting for the after-window; the rows below go to the capture
    finished = [], []
    for chunk in _chunks(rows[300:], 10):
        for row in chunk.tolist():
            finished[0].extend(one.slot("f", *row))
        finished[1].extend(bulk.slots("f", chunk))
    assert len(finished[0]) == len(finished[1]) == 1
    for name in ("epoch_s", "value", "forecast", "lower", "upper"):
        assert np.array_equal(getattr(finished[0][0], name), getattr(finished[1][0], name))


def test_noise_burst_quiet_window_equals_assess():
    z = np.random.default_rng(11).normal(size=300)
    one, bulk = NoiseBurstRule(clip_abs_z=2.5), NoiseBurstRule(clip_abs_z=2.5)
    for chunk in _chunks(z, 12):
        assert bulk.quiet_run_length(chunk) == chunk.size  # white z stays far below the limit
        for value in chunk.tolist():
            one.assess(Innovation(0, 0.0, 0.0, value, 1.0, value, -1.0, 1.0, 0.95, True))
        bulk.extend_quiet(chunk)
        assert bulk.state_dict() == one.state_dict()
        assert bulk.statistic == one.statistic and bulk.valid == one.valid


def test_noise_burst_run_stops_before_the_step_that_raises():
    rule = NoiseBurstRule()
    quiet = np.random.default_rng(13).normal(size=40)
    burst = np.random.default_rng(14).normal(0.0, 4.0, 40)
    z = np.concatenate([quiet, burst])
    count = rule.quiet_run_length(z)
    assert 40 <= count < 80
    for value in z[:count + 1].tolist():
        verdict = rule.assess(Innovation(0, 0.0, 0.0, value, 1.0, value, -1.0, 1.0, 0.95, True))
    # the step the bulk check stopped at is the first the rule itself raises at (or within 1e-9 of it)
    assert verdict.severity == "alarm" or math.isclose(rule.statistic, rule.limit(), rel_tol=1e-9)


@pytest.mark.parametrize("next_slot", [0, 7])
def test_grid_place_sorted_equals_place(next_slot):
    origin, interval = 1_780_000_000.0, 900.0
    rng = np.random.default_rng(15)
    epochs = origin + interval * np.arange(400) + rng.uniform(-200.0, 200.0, 400)
    epochs[50] += 0.4 * interval  # off the grid
    epochs = np.delete(epochs, np.s_[100:130])  # a gap: missing slots
    epochs = np.sort(np.concatenate([epochs, epochs[[20, 21, 300]] + 5.0]))  # duplicates of placed slots
    one, bulk = GridCursor(origin, interval, next_slot=next_slot), GridCursor(origin, interval, next_slot=next_slot)
    slots = [one.place(epoch) for epoch in epochs.tolist()]
    got = bulk.place_sorted(epochs)
    assert got.tolist() == [-1 if slot is None else slot for slot in slots]
    assert (bulk.next_slot, bulk.counts.as_dict()) == (one.next_slot, one.counts.as_dict())
    counts = one.counts.as_dict()
    assert counts["off_grid"] >= 1 and counts["duplicate"] >= 3 and counts["missing"] >= 30
    assert next_slot == 0 or counts["out_of_order"] >= 1  # slots before the cursor's start
