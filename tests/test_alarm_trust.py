"""Alarms an operator can trust: one alarm per level shift for as long as it lasts, accepted levels,
flatline against the feed's habits, one stale event per outage.

Outside references: the Nile's annual flow at Aswan (statsmodels' bundled ``nile`` data set), whose
mean fell in 1898 (Cobb, "The problem of the Nile: conditional solution to a changepoint problem",
Biometrika 65(2), 1978); and faults planted on seeded simulated feeds, where the truth (onset, end,
size) is known by construction. The fits are statsmodels' (leadline.detector.fitting).
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from leadline.detector.errors import DataError
from leadline.detector.fitting import fit
from leadline.detector.rules import AlarmLimits, FeedMonitor, MonitorConfig, budget_thresholds, sigma_thresholds
from leadline.detector.rules.thresholds import with_training_readings
from leadline.detector.spec import ModelSpec
from leadline.detector.stream import Stream

T0 = datetime(2024, 7, 1, tzinfo=timezone.utc)
INTERVAL_S = 60.0


def at(i: int) -> datetime:
    return T0 + timedelta(seconds=INTERVAL_S * i)


def run(monitor: FeedMonitor, values, first: int) -> list[tuple[int, object]]:
    """Process ``values`` as readings first, first + 1, ...; (index, event) of every event."""
    out = []
    for i, value in enumerate(values, start=first):
        out += [(i, event) for event in monitor.process(float(value), at(i))]
    return out


def onsets(events, rule):
    return [(i, ev) for i, ev in events if ev.rule == rule and ev.end is None]


# ---------------------------------------------------------------- the Nile
def test_nile_1898_drop_is_one_level_alarm_standing_until_1970():
    # Cobb (1978, Biometrika 65(2)) places the change of the Nile's mean flow at 1898 (the first
    # Aswan dam); the flow stays on the lower level to the end of the record (1970).
    from statsmodels.datasets import nile

    data = nile.load_pandas().data
    years = data["year"].astype(int).to_numpy()
    flow = data["volume"].to_numpy(dtype=float)
    before = years < 1898
    model = fit(flow[before], ModelSpec.white_noise())
    monitor = FeedMonitor("aswan", model.stream(), MonitorConfig(thresholds=sigma_thresholds()),
                          recent_readings=flow[before])
    events = []
    for year, value in zip(years[~before], flow[~before]):
        events += monitor.process(float(value), datetime(int(year), 1, 1, tzinfo=timezone.utc)).events
    level = [ev for ev in events if ev.rule == "cusum"]
    assert len(level) == 1 and level[0].end is None  # one event, never cleared
    assert 1898 <= level[0].start.year <= 1903
    standing = [ev for ev in monitor.open_events() if ev.rule == "cusum"]
    assert len(standing) == 1 and standing[0].start == level[0].start
    # the open event shows the level now against the level before (about 850 against about 1100)
    assert "before the episode" in standing[0].detail
    assert monitor.level.level_before > 1000 and monitor.level.departure < -150


# ------------------------------------------------------- a planted step
def _feed_with_step(phi: float, seed: int, size: float, n_train=1000, pre=200, step=200, post=200):
    rng = np.random.default_rng(seed)
    n = n_train + pre + step + post
    e = rng.standard_normal(n)
    x = np.zeros(n)
    for t in range(1, n):
        x[t] = phi * x[t - 1] + e[t]
    x += 40.0
    onset, end = n_train + pre, n_train + pre + step
    x[onset:end] += size
    return x, n_train, onset, end


@pytest.mark.parametrize("phi, spec", [(0.7, ModelSpec.ar(1)), (0.0, ModelSpec.white_noise())])
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_a_step_of_four_sigma_is_one_alarm_that_lasts_the_step_and_clears_soon_after(phi, spec, seed):
    # a 4 sigma step for 200 readings (sigma the shock sd), planted on a seeded simulation
    x, n_train, onset, end = _feed_with_step(phi, seed, 4.0)
    model = fit(x[:n_train], spec)
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=sigma_thresholds(), interval_s=INTERVAL_S),
                          recent_readings=x[:n_train])
    active = []
    events = []
    for i in range(n_train, x.size):
        events += [(i, ev) for ev in monitor.process(float(x[i]), at(i))]
        active.append(monitor.level_episode_open)
    active = np.array(active)
    during = active[onset - n_train:end - n_train]
    assert during.mean() >= 0.95
    after = active[end - n_train:]
    assert not after[:10].all()  # cleared within 10 readings of the step's end
    near = [(i, ev) for i, ev in onsets(events, "cusum") if onset <= i <= end + 10]
    assert len(near) == 1  # one event: no "shift down" for the return, no new event on the way


def test_the_level_condition_survives_a_state_round_trip_and_a_refit():
    x, n_train, onset, end = _feed_with_step(0.7, 2, 4.0)
    model = fit(x[:n_train], ModelSpec.ar(1))
    config = MonitorConfig(thresholds=sigma_thresholds(), interval_s=INTERVAL_S)
    monitor = FeedMonitor("f", model.stream(), config, recent_readings=x[:n_train])
    run(monitor, x[n_train:onset + 50], n_train)
    assert monitor.level_episode_open and monitor.level.holds()
    saved = json.loads(json.dumps(monitor.state_dict()))
    assert saved["v"] == 2 and saved["level"]["condition"]["level_before"] is not None
    resumed = FeedMonitor("f", Stream.from_bytes(monitor.stream.to_bytes()), config)
    resumed.load_state(saved)
    rest = x[onset + 50:]
    a = [(i, ev.rule, ev.start, ev.end, ev.detail) for i, ev in run(monitor, rest, onset + 50)]
    b = [(i, ev.rule, ev.start, ev.end, ev.detail) for i, ev in run(resumed, rest, onset + 50)]
    assert a == b and any(rule == "cusum" and end is not None for _, rule, _, end, _ in a)

    # after a refit the new monitor continues the episode and its condition
    old = FeedMonitor("f", model.stream(), config, recent_readings=x[:n_train])
    run(old, x[n_train:onset + 50], n_train)
    new = FeedMonitor("f", fit(x[onset - 300:onset + 50], ModelSpec.ar(1)).stream(), config)
    assert new.carry_over(old, at(onset + 49)) == []
    assert new.level_episode_open and new.level.state_dict() == old.level.state_dict()


def test_a_monitor_state_of_the_first_version_still_loads():
    x, n_train, _, _ = _feed_with_step(0.0, 1, 0.0)
    model = fit(x[:n_train], ModelSpec.white_noise())
    monitor = FeedMonitor("f", model.stream())
    run(monitor, x[n_train:n_train + 20], n_train)
    old = monitor.state_dict()
    old.pop("level")
    old["v"] = 1
    again = FeedMonitor("f", model.stream())
    again.load_state(old)
    assert not again.level.tracking and again.readings == 20


# ------------------------------------------------------------- accepting
def test_an_accepted_level_closes_the_episode_and_raises_nothing_more_on_it():
    x, n_train, onset, end = _feed_with_step(0.7, 3, 4.0, post=0)
    model = fit(x[:n_train], ModelSpec.ar(1))
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=sigma_thresholds()),
                          recent_readings=x[:n_train])
    assert monitor.accept_level(at(0), "r.amadi", "nothing open") == []
    run(monitor, x[n_train:onset + 30], n_train)
    assert monitor.level_episode_open
    closed = monitor.accept_level(at(onset + 29), "r.amadi", "second pump now runs at night")
    assert [(ev.rule, ev.end) for ev in closed] == [("cusum", at(onset + 29))]
    assert closed[0].detail == "accepted as the new normal by r.amadi: second pump now runs at night"
    assert not monitor.level_episode_open and not monitor.level.tracking
    later = run(monitor, x[onset + 30:end], onset + 30)
    assert onsets(later, "cusum") == []  # the new level is normal now


def test_engine_accept_level_closes_the_open_level_episode_or_refuses():
    from engine_helpers import ar1, settings
    from leadline.detector.engine import Engine, run_refit
    from leadline.detector.readings import Reading

    feed = "wickham-cross/main/flow"
    t0 = datetime(2024, 5, 6, tzinfo=timezone.utc)
    y = ar1(700, seed=11)
    y[500:] += 4.0
    engine = Engine(lambda feed_id: settings())
    with pytest.raises(DataError, match="unknown feed"):
        engine.accept_level(feed, t0, "a", "b")
    events = []
    for i in range(len(y)):
        if i == 450:
            with pytest.raises(DataError, match="no open level-shift episode"):
                engine.accept_level(feed, t0 + timedelta(minutes=i), "l.osei", "too early")
        out = engine.process(Reading(feed, t0 + timedelta(minutes=i), float(y[i])))
        events += out.events
        for request in out.refit_requests:
            events += engine.install_model(feed, run_refit(request), 1, request.reason).events
    level = [ev for ev in events if ev.rule == "cusum" and ev.start >= t0 + timedelta(minutes=500)]
    assert [ev.end for ev in level] == [None]  # one level alarm, still open
    when = t0 + timedelta(minutes=len(y))
    out = engine.accept_level(feed, when, "l.osei", "valve re-set")
    assert [(ev.rule, ev.end, ev.detail) for ev in out.events] == [
        ("cusum", when, "accepted as the new normal by l.osei: valve re-set")]
    with pytest.raises(DataError, match="no open level-shift episode"):
        engine.accept_level(feed, when, "l.osei", "twice")
    with pytest.raises(DataError, match="timezone-aware"):
        engine.accept_level(feed, datetime(2024, 5, 7), "l.osei", "naive")


# ----------------------------------------------------- flatline and habits
def _quantized(seed: int, n: int) -> np.ndarray:
    # a flow parked at a set point, read in whole units, sd 0.4: about 2/3 of readings repeat
    rng = np.random.default_rng(seed)
    return 50.0 + np.round(0.4 * rng.standard_normal(n))


@pytest.mark.parametrize("mode", ["sigma", "budget"])
@pytest.mark.parametrize("seed", [1, 2])
def test_a_quantized_feed_does_not_flood_and_a_frozen_rare_value_is_found(mode, seed):
    n_train, n_clean = 1000, 2000
    y = _quantized(seed, n_train + n_clean + 100)
    assert 0.55 < np.mean(y[1:n_train] == y[:n_train - 1]) < 0.75
    frozen = n_train + n_clean
    y[frozen:] = 51.0  # a value the feed held about one reading in ten
    model = fit(y[:n_train], ModelSpec.white_noise())
    th = (with_training_readings(sigma_thresholds(), y[:n_train]) if mode == "sigma"
          else budget_thresholds(model.standardized_residuals, interval_s=INTERVAL_S, values=y[:n_train]))
    assert th["flatline"]["habits"]["v"] == 1 and th["flatline"]["resolution"] == 1.0
    monitor = FeedMonitor("q", model.stream(), MonitorConfig(thresholds=th, interval_s=INTERVAL_S))
    assert monitor.rules["flatline"].habits is not None
    events = onsets(run(monitor, y[n_train:], n_train), "flatline")
    assert [i for i, _ in events if i < frozen] == []
    found = [i - frozen for i, _ in events if i >= frozen]
    assert found and found[0] <= 36


def test_limits_stored_without_habits_still_load_and_habits_round_trip():
    y = _quantized(3, 600)
    th = with_training_readings(sigma_thresholds(), y)
    again = AlarmLimits.from_json(json.loads(json.dumps(th.to_json())))
    assert again == th
    monitor = FeedMonitor("q", fit(y, ModelSpec.white_noise()).stream(), MonitorConfig(thresholds=again))
    habits = monitor.rules["flatline"].habits
    assert habits.probability(50.0) > 0.7 > 0.3 > habits.probability(51.0)
    old = th.to_json()
    del old["flatline"]["habits"]
    monitor = FeedMonitor("q", fit(y, ModelSpec.white_noise()).stream(),
                          MonitorConfig(thresholds=AlarmLimits.from_json(old)))
    assert monitor.rules["flatline"].habits is None


# ------------------------------------------------------------------ stale
def test_a_gap_in_reading_time_is_one_stale_event_opened_at_its_start_and_closed_at_the_reading():
    x, n_train, _, _ = _feed_with_step(0.0, 4, 0.0)
    monitor = FeedMonitor("f", fit(x[:n_train], ModelSpec.white_noise()).stream(),
                          MonitorConfig(interval_s=INTERVAL_S, stale_intervals=5))
    run(monitor, x[n_train:n_train + 10], 0)
    resumed = at(9) + timedelta(days=3)
    events = monitor.process(float(x[n_train + 10]), resumed).events
    stale = [ev for ev in events if ev.rule == "stale"]
    assert [(ev.start, ev.end) for ev in stale] == [(at(9) + timedelta(minutes=5), None),
                                                    (at(9) + timedelta(minutes=5), resumed)]
    assert "no reading for 3 d 0 h 0 min" in stale[1].detail
    after = monitor.process(float(x[n_train + 11]), resumed + timedelta(minutes=1)).events
    assert [ev for ev in after if ev.rule == "stale"] == [] and not monitor.lifecycles["stale"].is_active


def test_three_days_delivered_late_give_at_most_one_stale_event():
    x, n_train, _, _ = _feed_with_step(0.0, 5, 0.0, pre=0, step=0, post=0)
    rng = np.random.default_rng(5)
    live = 40.0 + rng.standard_normal(3 * 1440 + 30)
    monitor = FeedMonitor("f", fit(x[:n_train], ModelSpec.white_noise()).stream(),
                          MonitorConfig(interval_s=INTERVAL_S, stale_intervals=5))
    stale = []
    run(monitor, live[:10], 0)
    # the link is down for three days: the clock ticks every minute, nothing arrives
    for minute in range(10, 3 * 1440):
        stale += [ev for ev in monitor.tick(at(minute)) if ev.rule == "stale"]
    assert [ev.end for ev in stale] == [None]
    outage_detail_open = stale[0].detail
    assert "no reading since" in outage_detail_open
    # then the three days arrive late, 60 readings between clock ticks, the clock running on
    now = 3 * 1440
    for first in range(10, 3 * 1440, 60):
        for i in range(first, min(first + 60, 3 * 1440)):
            stale += [ev for ev in monitor.process(float(live[i]), at(i)) if ev.rule == "stale"]
        now += 1
        stale += [ev for ev in monitor.tick(at(now)) if ev.rule == "stale"]
    starts = {ev.start for ev in stale}
    assert len(starts) == 1  # one outage, one event identity
    # closed at the clock time the late readings began to arrive, the outage told in words
    assert [ev.end for ev in stale] == [None, at(3 * 1440 - 1)]
    assert stale[1].detail.startswith("no reading for 2 d 23 h 50 min") and "arrived late" in stale[1].detail
    assert monitor.readings == 3 * 1440 and math.isfinite(monitor.last_innovation.z)
