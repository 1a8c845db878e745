"""The evidence recorder: its windows around each episode and its memory bounds."""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from leadline.detector.engine import EngineOutput
from leadline.detector.events import AlarmEvent
from leadline.detector.evidence import EvidenceRecorder
from leadline.detector.innovation import Innovation
from leadline.detector.readings import Reading

UTC = timezone.utc
T0 = datetime(2026, 10, 19, 0, 0, tzinfo=UTC)
STEP = timedelta(minutes=15)
FEED = "fenwick/dm-north/flow"


def at(slot: int) -> datetime:
    return T0 + slot * STEP


def inn(slot: int, value: float | None = None, timestamp: bool = True) -> Innovation:
    v = float(slot) if value is None else value
    f = v - 0.5
    return Innovation(step=slot, value=v, forecast=f, error=v - f, variance=1.0, z=0.5, lower=f - 2.0,
                      upper=f + 2.0, level=0.95, absorbed=True, timestamp=at(slot) if timestamp else None)


def output(slot: int, events: tuple[AlarmEvent, ...] = (), feed: str = FEED) -> EngineOutput:
    return EngineOutput(events=list(events), innovations=[(feed, inn(slot))])


def onset(slot: int, rule: str = "cusum", feed: str = FEED) -> AlarmEvent:
    return AlarmEvent(feed, rule, "alarm", at(slot))


def run(recorder: EvidenceRecorder, slots: range, events: dict[int, list[AlarmEvent]]) -> dict[int, list]:
    """Feed slots in order; events listed under a slot arrive in that slot's output."""
    emitted = {}
    for s in slots:
        records = recorder.observe(output(s, tuple(events.get(s, ()))))
        if records:
            emitted[s] = records
    return emitted


def test_windows_before_during_and_after_an_episode():
    rec = EvidenceRecorder(before_slots=96, after_slots=24)
    ev = onset(150)
    cleared = ev.cleared(at(160))
    emitted = run(rec, range(400), {150: [ev], 160: [cleared]})
    # the clearing slot counts as the first after-slot: 160..183 are the 24 slots after it
    assert list(emitted) == [183]
    (record,) = emitted[183]
    assert record.complete and record.key == ev.key and record.end == at(160)
    expected_slots = np.arange(150 - 96, 184)
    assert np.array_equal(record.epoch_s, np.array([at(int(s)).timestamp() for s in expected_slots]))
    assert np.array_equal(record.value, expected_slots.astype(np.float32))
    assert np.allclose(record.upper - record.lower, 4.0)
    for name in ("value", "forecast", "lower", "upper"):
        assert getattr(record, name).dtype == np.float32
    assert record.omitted_slots == 0
    assert rec.open_keys() == []


def test_an_open_episode_gives_a_partial_record_on_demand_and_keeps_capturing():
    rec = EvidenceRecorder(before_slots=10, after_slots=4)
    ev = onset(20)
    run(rec, range(30), {20: [ev]})
    (part,) = rec.partial()
    assert not part.complete and part.end is None
    assert part.epoch_s[0] == at(10).timestamp() and part.epoch_s[-1] == at(29).timestamp()
    assert len(part) == 20
    emitted = run(rec, range(30, 40), {32: [ev.cleared(at(32))]})
    (final,) = emitted[35]
    assert final.complete and len(final) == 10 + (36 - 20)
    assert rec.partial() == []


def test_an_episode_cleared_at_its_onset_and_two_rules_at_once():
    rec = EvidenceRecorder(before_slots=5, after_slots=3)
    reset = AlarmEvent(FEED, "meter_reset", "warning", at(10), at(10))
    spike = onset(10, "spike")
    emitted = run(rec, range(20), {10: [reset, spike], 11: [spike.cleared(at(11))]})
    assert [r.rule for r in emitted[12]] == ["meter_reset"]
    assert [r.rule for r in emitted[13]] == ["spike"]
    assert len(emitted[12][0]) == 5 + 3 and len(emitted[13][0]) == 5 + 4


def test_a_long_episode_keeps_its_start_and_its_latest_slots_within_the_cap():
    rec = EvidenceRecorder(before_slots=96, after_slots=24, max_episode_slots=200)
    ev = onset(100)
    held = []
    emitted = {}
    for s in range(6000):
        events = [ev] if s == 100 else [ev.cleared(at(5000))] if s == 5000 else []
        out = rec.observe(output(s, tuple(events)))
        held.append(rec.held_slots(FEED))
        if out:
            emitted[s] = out
    assert max(held) <= rec.max_held_slots()
    (record,) = emitted[5023]
    assert len(record) == 96 + 200
    slots = np.round((record.epoch_s - T0.timestamp()) / 900).astype(int)
    assert list(slots[96:196]) == list(range(100, 200))  # the first half of the episode
    assert list(slots[196:]) == list(range(5024 - 100, 5024))  # the latest half, after-window included
    assert record.omitted_slots == (5024 - 100) - 200
    # only the ring is held once the record is out
    assert rec.held_slots(FEED) == 96 + 32


def test_memory_per_feed_is_bounded_by_the_capture_cap():
    rec = EvidenceRecorder(before_slots=8, after_slots=2, max_episode_slots=20, max_captures_per_feed=4)
    pushed = []
    for s in range(100):
        events = [onset(s, f"rule{s}")] if s % 5 == 0 else []
        pushed += rec.observe(output(s, tuple(events)))
        assert rec.held_slots(FEED) <= rec.max_held_slots()
    assert len(rec.open_keys()) == 4
    # the oldest open episodes were pushed out, incomplete, oldest first
    assert [r.rule for r in pushed][:3] == ["rule0", "rule5", "rule10"]
    assert not any(r.complete for r in pushed)


def test_feeds_are_kept_apart():
    rec = EvidenceRecorder(before_slots=4, after_slots=1)
    other = "fenwick/reservoir/level"
    for s in range(10):
        rec.observe(EngineOutput(innovations=[(FEED, inn(s)), (other, inn(s, value=100.0 + s))]))
    ev = onset(10, feed=other)
    rec.observe(EngineOutput(events=[ev], innovations=[(FEED, inn(10)), (other, inn(10, value=110.0))]))
    (part,) = rec.partial()
    assert part.feed_id == other
    assert list(part.value) == [106.0, 107.0, 108.0, 109.0, 110.0]


def test_a_slot_without_time_takes_the_readings_time_and_value():
    # an out-of-range reading reaches the model as a missing slot: its innovation has no value or time
    rec = EvidenceRecorder(before_slots=2, after_slots=0)
    for s in range(3):
        rec.observe(output(s))
    missing = inn(3, value=math.nan, timestamp=False)
    ev = AlarmEvent(FEED, "range", "alarm", at(3))
    reading = Reading(FEED, at(3), -7.5)
    rec.observe(EngineOutput(events=[ev], innovations=[(FEED, missing)]), reading=reading)
    (part,) = rec.partial()
    assert part.epoch_s[-1] == at(3).timestamp() and part.value[-1] == np.float32(-7.5)


def test_bad_sizes_are_refused():
    with pytest.raises(ValueError, match="max_episode_slots"):
        EvidenceRecorder(after_slots=24, max_episode_slots=48)
    with pytest.raises(ValueError, match=">= 0"):
        EvidenceRecorder(before_slots=-1)


def test_one_output_replaying_many_slots_places_its_events_among_them():
    # the readings buffered while a feed was fitted come back in one output with their events
    rec = EvidenceRecorder(before_slots=96, after_slots=24)
    ev = onset(150)
    other = "fenwick/booster/pressure"
    innovations = [(FEED, inn(s)) for s in range(300)] + [(other, inn(s)) for s in range(300)]
    out = EngineOutput(events=[ev.cleared(at(160)), ev, onset(20, feed=other)], innovations=innovations)
    records = rec.observe(out)
    mine = [r for r in records if r.feed_id == FEED]
    (record,) = mine
    slots = np.round((record.epoch_s - T0.timestamp()) / 900).astype(int)
    assert list(slots) == list(range(54, 184))
    assert rec.open_keys() == [(other, "cusum", at(20))]
    (part,) = rec.partial()
    assert part.epoch_s[0] == at(0).timestamp() and len(part) == 300
