"""FeedMonitor on real fitted models: insulation, range, re-anchoring, stale, budget.

The models are fitted by leadline.detector.fitting (statsmodels SARIMAX
underneath) on simulated feeds with fixed seeds. References: the fitted
AR(1) must recover the simulated phi (statsmodels as the reference fit);
the budget check uses scipy's Student t and normal distributions.
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from leadline.detector.errors import DataError, RuleError
from leadline.detector.events import CAUTION
from leadline.detector.fitting import fit
from leadline.detector.rules import AlarmLimits, FeedMonitor, MonitorConfig, budget_thresholds, sigma_thresholds
from leadline.detector.rules.thresholds import DAY_S, WEEK_S
from leadline.detector.spec import ModelSpec

T0 = datetime(2024, 7, 1, tzinfo=timezone.utc)
INTERVAL_S = 60.0
PHI = 0.6


def at(i: int) -> datetime:
    return T0 + timedelta(seconds=INTERVAL_S * i)


def simulate_ar1(n: int, seed: int, phi: float = PHI, mean: float = 40.0, shocks=None) -> np.ndarray:
    rng = np.random.default_rng(seed)
    e = rng.standard_normal(n) if shocks is None else shocks
    x = np.zeros(n)
    for t in range(1, n):
        x[t] = phi * x[t - 1] + e[t]
    return mean + x


@pytest.fixture(scope="module")
def ar1():
    """An AR(1) fitted on 1500 readings, and the next 400 clean readings of the same feed."""
    y = simulate_ar1(1900, seed=8)
    model = fit(y[:1500], ModelSpec.ar(1))
    assert model.params["ar.L1"] == pytest.approx(PHI, abs=0.05)  # statsmodels recovers the simulated phi
    th = budget_thresholds(model.standardized_residuals, interval_s=INTERVAL_S, false_alarms=1, per_s=WEEK_S,
                           values=y[:1500])
    return model, th, y[1500:]


def run(monitor: FeedMonitor, values, start: int = 0):
    events, innovations = [], []
    for i, v in enumerate(values):
        events += monitor.process(float(v), at(start + i))
        innovations.append(monitor.last_innovation)
    return events, innovations


def onsets(events):
    return [ev for ev in events if ev.end is None]


@pytest.mark.parametrize("insulate", [True, False])
def test_a_10_sigma_spike_gives_exactly_one_event(ar1, insulate):
    model, th, clean = ar1
    sigma = math.sqrt(model.sigma2)
    values = clean[:200].copy()
    values[100] += 10 * sigma
    monitor = FeedMonitor("plant/flow/a", model.stream(model_version=3),
                          MonitorConfig(thresholds=th, insulate_outliers=insulate))
    events, inns = run(monitor, values)
    assert len(onsets(events)) == 1
    onset = onsets(events)[0]
    assert onset.rule == "spike" and onset.severity == "alarm" and onset.start == at(100)
    assert onset.value_at_onset == values[100] and onset.model_version == 3
    assert onset.caution == CAUTION
    closes = [ev for ev in events if ev.end is not None]
    assert len(closes) == 1 and closes[0].key == onset.key
    band = th["spike"]["warning_abs_z"]
    after = [abs(inn.z) for inn in inns[101:121]]
    if insulate:
        # the spike was not absorbed: the next 20 innovations stay in the usual band
        assert not inns[100].absorbed
        assert max(after) < band
    else:
        # absorbed, the AR(1) carries phi * 10 sigma into the next forecast (the contrast)
        assert inns[100].absorbed
        assert after[0] > band
        assert inns[101].z == pytest.approx(-PHI * 10, abs=1.5)


def test_insulation_leaves_the_state_as_for_a_missing_reading(ar1):
    model, th, clean = ar1
    spiked = clean[:50].copy()
    spiked[20] += 12 * math.sqrt(model.sigma2)
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=th))
    run(monitor, spiked[:21])
    reference = model.stream()
    for v in clean[:20]:
        reference.update(float(v))
    reference.update(math.nan)
    assert np.allclose(monitor.stream.state, reference.state)


def test_out_of_range_values_alarm_at_once_and_never_reach_the_model(ar1):
    model, th, clean = ar1
    values = clean[:40].copy()
    values[10] = -5.0  # a negative flow
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=th, range_low=0.0))
    events, inns = run(monitor, values)
    assert [(ev.rule, ev.start, ev.end) for ev in events] == [("range", at(10), None), ("range", at(10), at(11))]
    assert events[0].value_at_onset == -5.0 and math.isnan(events[0].peak_abs_z)
    assert math.isfinite(events[0].forecast_at_onset)
    assert inns[10].is_missing and not inns[10].absorbed
    # the stream saw a missing slot there, nothing else
    reference = model.stream()
    for i, v in enumerate(values):
        reference.update(math.nan if i == 10 else float(v))
    assert np.allclose(monitor.stream.state, reference.state)
    assert monitor.stream.step == reference.step


@pytest.mark.parametrize("spec, size", [(ModelSpec.white_noise(), 6.0), (ModelSpec.ar(1), 6.0),
                                        (ModelSpec.ar(1), -6.0), (ModelSpec.arima(0, 1, 1), 6.0)],
                         ids=["white", "ar1", "ar1-down", "arima011"])
def test_a_level_shift_is_confirmed_and_the_forecasts_reanchored(spec, size):
    rng = np.random.default_rng(31)
    e = rng.standard_normal(1800)
    if spec.order == (0, 1, 1):
        y = 40.0 + np.cumsum(e + np.concatenate([[0.0], -0.5 * e[:-1]]))
    else:
        y = simulate_ar1(1800, 0, phi=PHI if spec.order[0] else 0.0, shocks=e)
    model = fit(y[:1500], spec)
    th = budget_thresholds(model.standardized_residuals, interval_s=INTERVAL_S, false_alarms=1, per_s=WEEK_S)
    x = y[1500:].copy()
    x[100:] += size * math.sqrt(model.sigma2)
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=th))
    events, inns = run(monitor, x)
    cusum = [ev for ev in onsets(events) if ev.rule == "cusum"]
    assert cusum and at(100) <= cusum[0].start <= at(107)
    assert monitor.reanchors >= 1
    z_after = np.array([inn.z for inn in inns[150:]])
    # back on the new level: the re-anchoring estimate has a standard error of
    # about 0.2 sigma, so 0.5 is 2.5 SE; without it the mean would be near the shift
    assert abs(z_after.mean()) < 0.5
    assert not [ev for ev in onsets(events) if ev.start >= at(150)]  # and quiet there
    if spec.order[1] == 0:
        assert monitor.stream.level_offset == pytest.approx(size * math.sqrt(model.sigma2), abs=0.6)


def test_a_noise_burst_is_raised_and_does_not_move_the_level(ar1):
    model, th, clean = ar1
    rng = np.random.default_rng(5)
    values = clean[:200].copy()
    values[100:148] += rng.normal(0, math.sqrt(8 * model.sigma2), 48)  # spread x3
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=th))
    events, _ = run(monitor, values)
    bursts = [ev for ev in onsets(events) if ev.rule == "noise_burst"]
    assert bursts and bursts[0].start <= at(124)
    assert abs(monitor.stream.level_offset) < 1.0


def test_a_frozen_reading_raises_flatline(ar1):
    model, th, clean = ar1
    values = np.round(clean[:120], 2)
    values[60:] = values[59]
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=th, flatline_resolution=0.01))
    events, _ = run(monitor, values)
    flat = [ev for ev in onsets(events) if ev.rule == "flatline"]
    assert len(flat) == 1 and at(60) <= flat[0].start <= at(60 + 24)


def test_stale_feed_is_raised_by_tick_and_cleared_by_the_next_reading(ar1):
    model, th, clean = ar1
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=th, interval_s=INTERVAL_S,
                                                              stale_intervals=5))
    run(monitor, clean[:10])
    assert monitor.tick(at(9) + timedelta(minutes=4)) == []
    raised = monitor.tick(at(9) + timedelta(minutes=6))
    assert [(ev.rule, ev.start) for ev in raised] == [("stale", at(9) + timedelta(minutes=5))]
    assert monitor.tick(at(9) + timedelta(minutes=7)) == []  # one episode, one event
    cleared = monitor.process(float(clean[10]), at(20))
    assert [(ev.rule, ev.end) for ev in cleared] == [("stale", at(20))]
    # an empty slot does not keep the feed fresh
    monitor.process(math.nan, at(21))
    assert monitor.tick(at(20) + timedelta(minutes=5)) != []


def test_missing_readings_and_bad_timestamps(ar1):
    model, th, clean = ar1
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=th))
    step = monitor.stream.step
    assert monitor.process(math.nan, at(0)).events == []
    assert monitor.stream.step == step + 1 and monitor.last_innovation.is_missing
    with pytest.raises(DataError, match="timezone-aware"):
        monitor.process(1.0, datetime(2024, 1, 1))
    with pytest.raises(RuleError, match="unknown innovation rules"):
        FeedMonitor("f", model.stream(), MonitorConfig(rules=("spike", "psychic")))


def test_status_is_json_serialisable(ar1):
    model, th, clean = ar1
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=th, interval_s=60, range_low=0.0))
    run(monitor, clean[:30])
    status = json.loads(json.dumps(monitor.status()))
    assert set(status["rules"]) == {"spike", "cusum", "noise_burst", "flatline", "range", "stale"}
    assert status["readings"] == 30 and status["rules"]["cusum"]["state"] in ("normal", "pending", "active")


def test_sigma_mode_runs_with_default_limits(ar1):
    model, _, clean = ar1
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=sigma_thresholds(warning_abs_z=3.5)))
    assert monitor.spike.warning_abs_z == 3.5 and monitor.cusum.cusum.h == 5.0
    run(monitor, clean[:50])


@pytest.mark.slow
def test_budget_mode_keeps_a_heavy_tailed_feed_within_its_budget():
    # A feed with Student t (4 df) noise around a constant level, so that its
    # one-step innovations are t(4); the model is fitted on 5000 readings,
    # then 10,000 clean readings are scored by every rule. Budget: one false
    # alarm per day at 60 s. Counting every event of every rule, budget mode
    # stays within the budget (allowing 3 Poisson SE of the count), while
    # the Gaussian limits for the same nominal rates exceed it.
    rng = np.random.default_rng(404)
    y = np.round(40.0 + rng.standard_t(4, 15_000) / math.sqrt(2), 3)
    model = fit(y[:5000], ModelSpec.white_noise())
    th = budget_thresholds(model.standardized_residuals, interval_s=60, false_alarms=1, per_s=DAY_S,
                           values=y[:5000])
    gaussian = th.to_json()
    gaussian["spike"].update(warning_abs_z=th["spike"]["gaussian_warning_abs_z"],
                             alarm_abs_z=th["spike"]["gaussian_alarm_abs_z"],
                             clear_abs_z=0.75 * th["spike"]["gaussian_warning_abs_z"])
    gaussian["cusum"]["h"] = th["cusum"]["gaussian_h"]
    gaussian["noise_burst"]["limit_scale"] = 1.0
    gaussian = AlarmLimits.from_json(gaussian)
    counts = {}
    for name, limits in (("budget", th), ("gaussian", gaussian)):
        monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=limits))
        events, _ = run(monitor, y[5000:])
        counts[name] = len(onsets(events))
    budget = th.budget["per_point_rate"] * 10_000
    allowed = budget + 3 * math.sqrt(budget)
    assert counts["budget"] <= allowed, counts
    assert counts["gaussian"] > 3 * allowed, counts


def test_a_process_shock_is_recognised_by_the_next_reading(ar1):
    # An 8-sigma *shock* of the AR(1) process (an innovation outlier): the
    # process really moves and the next readings follow it. The reading is
    # insulated at first; the next one fits the absorbed view, so the state
    # is put back in step and no follow-on alarm is raised.
    model, th, _ = ar1
    rng = np.random.default_rng(77)
    shocks = rng.standard_normal(300)
    shocks[150] = 8.0 * math.sqrt(model.sigma2)
    y = simulate_ar1(300, 0, phi=model.params["ar.L1"], mean=model.params["intercept"] / (1 - model.params["ar.L1"]),
                     shocks=shocks)
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=th))
    events, inns = run(monitor, y)
    assert [ev.rule for ev in onsets(events)] == ["spike"]
    assert not inns[150].absorbed and inns[151].absorbed and monitor.shocks >= 1
    assert abs(inns[151].z) < th["spike"]["clear_abs_z"]
    assert max(abs(inn.z) for inn in inns[151:200]) < th["spike"]["warning_abs_z"]


def test_carry_over_keeps_open_episodes_and_restarts_the_statistics(ar1):
    model, th, clean = ar1
    values = clean[:60].copy()
    values[50] += 12 * math.sqrt(model.sigma2)
    monitor = FeedMonitor("f", model.stream(model_version=1), MonitorConfig(thresholds=th))
    events, _ = run(monitor, values[:51])
    assert monitor.lifecycles["spike"].is_active
    # the next model's monitor continues the episode: no event now, the statistics start afresh
    successor = FeedMonitor("f", model.stream(model_version=2), MonitorConfig(thresholds=th))
    assert successor.carry_over(monitor, at(50)) == []
    assert successor.lifecycles["spike"].is_active and successor.lifecycles["spike"] is monitor.lifecycles["spike"]
    assert successor.cusum.cusum.statistic == 0.0 and successor.noise_burst.valid == 0
    later, _ = run(successor, values[51:], start=51)
    closes = [ev for ev in later if ev.end is not None]
    assert [ev.key for ev in closes] == [onsets(events)[0].key]  # the same episode, closed on the new model
    # a rule the next model does not run has its episode closed at once
    fewer = FeedMonitor("f", model.stream(model_version=3), MonitorConfig(thresholds=th, rules=("cusum",)))
    monitor2 = FeedMonitor("f", model.stream(model_version=1), MonitorConfig(thresholds=th))
    run(monitor2, values[:51])
    (closed,) = fewer.carry_over(monitor2, at(51))
    assert closed.rule == "spike" and closed.end == at(51)
    assert "model version 3 has no spike rule" in closed.detail


def test_the_optional_ewma_rule_runs_in_the_monitor(ar1):
    model, _, clean = ar1
    th = budget_thresholds(model.standardized_residuals, interval_s=INTERVAL_S, false_alarms=1, per_s=WEEK_S,
                           ewma_lam=0.1)
    monitor = FeedMonitor("f", model.stream(), MonitorConfig(thresholds=th))
    values = clean[:200].copy()
    values[100:] += 2.0 * math.sqrt(model.sigma2)  # a small sustained shift
    events, _ = run(monitor, values)
    assert "ewma" in monitor.lifecycles
    assert {ev.rule for ev in onsets(events)} & {"ewma", "cusum"}
    assert json.loads(json.dumps(monitor.status()))["rules"]["ewma"]["limit"] > 0
