"""The alarm lifecycle: on-delay, deadband, off-delay, one event per episode.

The requirements come from the alarm-management practice of on-delay,
deadband and off-delay against nuisance and chattering alarms (ANSI/ISA-18.2,
EEMUA 191) [from memory; common practice], and from leadline's own rule that
one episode gives one event identity (detector/events.py).
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone

import pytest

from leadline.detector.errors import RuleError
from leadline.detector.events import CAUTION
from leadline.detector.innovation import Innovation
from leadline.detector.rules import AlarmLifecycle, Assessment, LifecycleConfig, SpikeRule

T0 = datetime(2024, 3, 1, tzinfo=timezone.utc)


def at(i: int) -> datetime:
    return T0 + timedelta(minutes=i)


def innovation(z: float, step: int = 0, forecast: float = 10.0, variance: float = 4.0) -> Innovation:
    sd = math.sqrt(variance)
    value = forecast + z * sd if math.isfinite(z) else math.nan
    return Innovation(step, value, forecast, value - forecast, variance, z, forecast - 1.96 * sd,
                      forecast + 1.96 * sd, 0.95, True)


def run(zs, rule=None, config=None):
    """Feed |z| values through a spike rule and a lifecycle; return all events with their step."""
    rule = rule or SpikeRule(warning_abs_z=4.0, alarm_abs_z=6.0, clear_abs_z=3.0)
    life = AlarmLifecycle("feed/a", rule.name, rule.parameters(), config or LifecycleConfig())
    out = []
    for i, z in enumerate(zs):
        inn = innovation(z, i)
        for ev in life.step(rule.assess(inn), at(i), inn, model_version=7):
            out.append((i, ev))
    return out, life


def test_one_episode_gives_one_event_identity_emitted_at_onset_and_at_clearing():
    events, life = run([0, 0, 5, 4.5, 3.5, 1, 0])
    assert [(i, ev.end is None) for i, ev in events] == [(2, True), (5, False)]
    onset, cleared = events[0][1], events[1][1]
    assert onset.key == cleared.key == ("feed/a", "spike", at(2))
    assert cleared.end == at(5)
    assert life.state == "normal" and not life.is_active


def test_event_records_onset_context_peak_and_parameters():
    events, _ = run([0, 5, 6.5, 4.5, 0])
    onset, cleared = events[0][1], events[1][1]
    assert onset.value_at_onset == pytest.approx(10.0 + 5 * 2.0)
    assert onset.forecast_at_onset == 10.0
    assert onset.lower_at_onset == pytest.approx(10.0 - 1.96 * 2.0)
    assert onset.upper_at_onset == pytest.approx(10.0 + 1.96 * 2.0)
    assert onset.peak_abs_z == 5.0 and onset.severity == "warning"
    # the closing event keeps the onset context but has the peak and the escalation
    assert cleared.peak_abs_z == 6.5 and cleared.severity == "alarm"
    assert cleared.value_at_onset == onset.value_at_onset
    assert cleared.parameters["warning_abs_z"] == 4.0 and cleared.parameters["off_delay_steps"] == 1
    assert cleared.model_version == 7
    assert cleared.caution == CAUTION
    assert "escalated" in cleared.detail


def test_on_delay_k_of_n_needs_k_hits_inside_the_window():
    config = LifecycleConfig(on_delay_k=3, on_delay_n=5)
    # 2 hits in any 5 steps: never active
    events, _ = run([5, 0, 0, 5, 0, 0, 0, 5, 0, 0], config=config)
    assert events == []
    # the third hit within 5 steps activates, at that third hit
    events, _ = run([5, 0, 5, 0, 5, 0], config=config)
    assert events[0][0] == 4 and events[0][1].start == at(4)


def test_deadband_holds_the_alarm_between_clear_and_raise_levels():
    # 3.5 lies between clear (3.0) and raise (4.0): the episode stays open
    events, life = run([5, 3.5, 3.5, 3.5, 3.9, 3.2])
    assert [i for i, _ in events] == [0]
    assert life.is_active
    events, life = run([5, 3.5, 3.5, 2.9])
    assert [(i, ev.end is not None) for i, ev in events] == [(0, False), (3, True)]


def test_off_delay_needs_consecutive_clear_steps_and_restarts_on_a_non_clear_step():
    config = LifecycleConfig(off_delay_steps=3)
    events, _ = run([5, 1, 1, 3.5, 1, 1, 1, 0], config=config)
    # clear at 1, 2; the deadband step 3 restarts the count; clear at 4, 5, 6
    assert [(i, ev.end is not None) for i, ev in events] == [(0, False), (6, True)]
    assert events[1][1].end == at(6)


@pytest.mark.parametrize("off_delay", [1, 3])
def test_chattering_input_gives_at_most_one_event_per_episode(off_delay):
    # A signal crossing the raise level back and forth: 4.4, 3.6, 4.4, 3.6 ...
    # (Above the clear level 3.0, so one episode.) Then quiet, then a second burst.
    chatter = [4.4 if i % 2 == 0 else 3.6 for i in range(40)]
    zs = [0] * 5 + chatter + [0] * 10 + chatter + [0] * 10
    events, _ = run(zs, config=LifecycleConfig(off_delay_steps=off_delay))
    onsets = [ev for _, ev in events if ev.end is None]
    closes = [ev for _, ev in events if ev.end is not None]
    assert len(onsets) == 2 and len(closes) == 2
    assert [ev.key for ev in onsets] == [ev.key for ev in closes]


def test_without_a_deadband_the_same_chatter_would_give_many_events():
    # The contrast that shows the deadband does the work: clear level = raise level.
    chatter = [4.4 if i % 2 == 0 else 3.6 for i in range(40)]
    rule = SpikeRule(warning_abs_z=4.0, alarm_abs_z=6.0, clear_abs_z=4.0)
    events, _ = run(chatter, rule=rule)
    assert len([ev for _, ev in events if ev.end is None]) == 20


def test_missing_readings_hold_the_state():
    config = LifecycleConfig(on_delay_k=2, on_delay_n=2, off_delay_steps=2)
    nan = math.nan
    events, _ = run([5, nan, nan, 5, 1, nan, 1, 0], config=config)
    # the NaNs neither break the on-delay nor the off-delay
    assert [(i, ev.end is not None) for i, ev in events] == [(3, False), (6, True)]


def test_status_reports_state_names():
    rule = SpikeRule(4.0, 6.0, 3.0)
    life = AlarmLifecycle("f", "spike", rule.parameters(), LifecycleConfig(2, 3, 2))
    assert life.status()["state"] == "normal"
    life.step(rule.assess(innovation(5)), at(0), None)
    assert life.status()["state"] == "pending"
    life.step(rule.assess(innovation(5)), at(1), None)
    assert life.status()["state"] == "active"
    life.step(rule.assess(innovation(1)), at(2), None)
    assert life.status()["state"] == "clearing"
    assert life.status()["start"] == at(1).isoformat()


def test_bad_lifecycle_parameters_are_refused_by_name():
    with pytest.raises(RuleError, match="on_delay_k"):
        LifecycleConfig(on_delay_k=0)
    with pytest.raises(RuleError, match="must not exceed on_delay_n"):
        LifecycleConfig(on_delay_k=3, on_delay_n=2)
    with pytest.raises(RuleError, match="off_delay_steps"):
        LifecycleConfig(off_delay_steps=0)
    with pytest.raises(RuleError, match="both raise and clear"):
        Assessment("alarm", True)
    life = AlarmLifecycle("f", "spike")
    with pytest.raises(RuleError, match="timezone-aware"):
        life.step(Assessment("alarm", False), datetime(2024, 1, 1))
    with pytest.raises(RuleError, match="no open episode"):
        life.close(at(0))
