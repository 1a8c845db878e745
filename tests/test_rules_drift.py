"""The drift rule on differenced feeds.

References: the model is statsmodels' own SARIMAX ARIMA(0,1,1) with fixed
parameters (its system matrices read by ``system_from_results``), and the
streams are held to statsmodels' filter elsewhere (tests/test_stream_exactness.py).
The rule's accumulated statistic must equal :class:`HorizonDrift` driven by the
real stream's state (``assess_stream``, itself checked against statsmodels'
``get_forecast`` in tests/test_rules_horizon_drift.py). The one-step rules it is
compared with get their limits for the same false-alarm rate from their
published run lengths: the Shewhart |z| limit Phi^-1(1 - r/2) (Montgomery,
Introduction to Statistical Quality Control, 7th ed., section 6.2) and the
CUSUM h for ARL0 = 1/r by the Markov chain of Brook & Evans (1972) (:mod:`leadline.detector.rules.arl`).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy.stats import norm
from statsmodels.tsa.statespace.sarimax import SARIMAX

from leadline.detector.rules.arl import cusum_h_for_arl
from leadline.detector.rules.drift import (DriftRule, build, complete_section, drift_limit, drift_options,
                                           steady_cov)
from leadline.detector.rules.horizon_drift import HorizonDrift
from leadline.detector.spec import ModelSpec
from leadline.detector.statespace import system_from_results
from leadline.detector.stream import Stream
from leadline.detector.errors import StateFormatError

THETA = -0.5
HORIZON = 96
RATE = 1e-3  # false alarms per slot, shared by every rule compared


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(11)
    e = rng.standard_normal(400)
    y = np.cumsum(e[1:] + THETA * e[:-1])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = SARIMAX(y, order=(0, 1, 1)).filter(np.array([THETA, 1.0]))
    system = system_from_results(res)
    return system, steady_cov(system)


def arima011(n: int, seed: int, ramp_start: int | None = None, ramp_per_step: float = 0.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    e = rng.standard_normal(n + 1)
    y = np.cumsum(e[1:] + THETA * e[:-1])
    if ramp_start is not None:
        y[ramp_start:] += ramp_per_step * np.arange(1, n - ramp_start + 1)
    return y


def stream_of(system, cov) -> Stream:
    return Stream(system, np.zeros(system.k_states), cov, 0, steady=True)


def test_the_rule_gives_the_statistic_of_the_real_stream(model):
    system, cov = model
    y = arima011(300, seed=3, ramp_start=150, ramp_per_step=0.1)
    stream = stream_of(system, cov)
    rule = DriftRule(system, cov, HORIZON, 3.0)
    reference = HorizonDrift(system, HORIZON)
    got, want = [], []
    for i, v in enumerate(y):
        value = math.nan if i % 37 == 5 else float(v)  # a few missing readings
        want.append(reference.assess_stream(value, stream).accumulated)
        inn = stream.update(value)
        rule.assess(inn)
        got.append(rule.last)
    np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-9)


def count_alarms(rule_factory, series, model, start: int = 0) -> list[int | None]:
    """First slot >= start at which each series raises; None when it never does."""
    system, cov = model
    out = []
    for y in series:
        stream = stream_of(system, cov)
        rule = rule_factory()
        first = None
        for i, v in enumerate(y):
            inn = stream.update(float(v))
            verdict = rule(inn)
            if verdict and i >= start and first is None:
                first = i
        out.append(first)
    return out


def drift_factory(model, limit):
    system, cov = model

    def make():
        rule = DriftRule(system, cov, HORIZON, limit)
        return lambda inn: (v := rule.assess(inn)) is not None and v.severity is not None
    return make


def spike_factory():
    limit = norm.isf(RATE / 2)
    return lambda: (lambda inn: abs(inn.z) >= limit)


def cusum_factory():
    k, h = 0.5, cusum_h_for_arl(0.5, 1.0 / RATE)

    def make():
        s = [0.0, 0.0]

        def step(inn):
            s[0] = max(0.0, s[0] + inn.z - k)
            s[1] = max(0.0, s[1] - inn.z - k)
            if max(s) > h:
                s[0] = s[1] = 0.0
                return True
            return False
        return step
    return make


@pytest.mark.slow
def test_a_slow_ramp_is_found_far_more_often_than_by_the_spike_rule(model):
    """0.15 shock sd per step on ARIMA(0,1,1), theta -0.5: one-step innovations settle at 0.3 sd.

    Measured while writing this check (60 seeded series, 200 slots after the
    onset): drift 0.75, spike 0.27, CUSUM (k = 0.5) 0.75. The drift rule finds
    the ramp far more often than the spike rule and as often as the CUSUM;
    the standard error of a proportion near 0.75 over 60 series is 0.056.
    """
    system, cov = model
    limit, method = drift_limit(system, cov, HORIZON, RATE)
    assert method == "calibrated"
    onset, within = 100, 200
    series = [arima011(onset + within, seed=100 + s, ramp_start=onset, ramp_per_step=0.15) for s in range(60)]
    found = {}
    for name, factory in (("drift", drift_factory(model, limit)), ("spike", spike_factory()),
                          ("cusum", cusum_factory())):
        firsts = count_alarms(factory, series, model, start=onset)
        found[name] = sum(f is not None for f in firsts) / len(series)
    assert found["drift"] >= 0.6 and found["drift"] >= 2.0 * found["spike"], found
    assert found["drift"] >= found["cusum"] - 0.15, found


@pytest.mark.slow
def test_on_clean_data_it_raises_at_the_budgets_rate(model):
    """Windows with an exceedance per slot, against RATE: within 35% (about 3 Poisson sd at ~90 expected)."""
    system, cov = model
    limit, _ = drift_limit(system, cov, HORIZON, RATE)
    n_slots, windows_hit = 0, 0
    for s in range(30):
        y = arima011(3072, seed=500 + s)
        stream = stream_of(system, cov)
        rule = DriftRule(system, cov, HORIZON, limit)
        hit = False
        for v in y:
            verdict = rule.assess(stream.update(float(v)))
            hit = hit or (verdict is not None and verdict.severity is not None)
            if rule.statistic.h == HORIZON:
                windows_hit += hit
                hit = False
        n_slots += y.size
    rate = windows_hit / n_slots
    assert abs(rate - RATE) <= 0.35 * RATE, rate


def test_built_only_for_a_model_with_differencing_and_state_round_trips(model):
    system, cov = model
    section = {"horizon": HORIZON, "rate_per_slot": RATE}
    assert complete_section(section, ModelSpec(order=(1, 0, 0)), system) is None
    assert drift_options({}, ModelSpec(order=(1, 0, 0)))["drift_horizon"] is None
    assert drift_options({}, ModelSpec(order=(0, 1, 1)))["drift_horizon"] == HORIZON
    done = complete_section(section, ModelSpec(order=(0, 1, 1)), system)
    assert done["differencing"] == 1 and done["limit_method"] == "calibrated"
    rule = build(done, None)
    assert isinstance(rule, DriftRule) and rule.limit_abs == done["limit_abs"]
    stream = stream_of(system, cov)
    for v in arima011(70, seed=9):
        rule.assess(stream.update(float(v)))
    saved = rule.state_dict()
    assert saved["v"] == 1
    again = build(done, None)
    again.load_state(saved)
    assert not again.statistic.anchored  # a restore starts a new anchor window
    with pytest.raises(StateFormatError):
        again.load_state({**saved, "v": 99})
    rule.level_moved()
    assert not rule.statistic.anchored
    # a tiny rate: the union bound, whose rate is at most the budget
    small, method = drift_limit(system, cov, HORIZON, 1e-7)
    assert method == "bonferroni" and small == pytest.approx(norm.isf(0.5e-7))


def test_the_monitor_builds_the_drift_rule_from_a_fit_with_differencing_only():
    from datetime import datetime, timedelta, timezone

    from leadline.detector.fitting import fit
    from leadline.detector.refit import thresholds_from_config
    from leadline.detector.rules import FeedMonitor, MonitorConfig

    y = 50.0 + arima011(600, seed=21)
    config = {"mode": "budget", "false_alarms_per_week": 0.2, "budget_options": {}, "sigma_limits": {}}
    for spec, built in ((ModelSpec(order=(0, 1, 1)), True), (ModelSpec(order=(1, 0, 0)), False)):
        fitted = fit(y, spec)
        limits = thresholds_from_config(fitted, y, 60.0, config)
        assert (limits["drift"] is not None) == built
        if built:  # half of the CUSUM's share, out of the same budget
            assert limits.budget["shares"]["drift"] == limits.budget["shares"]["cusum"] == 0.175
        monitor = FeedMonitor("f", fitted.stream(), MonitorConfig(thresholds=limits, interval_s=60.0))
        assert ("drift" in monitor.rules) == built
        t0 = datetime(2026, 6, 1, tzinfo=timezone.utc)
        for i, v in enumerate(50.0 + arima011(50, seed=22)):
            monitor.process(float(v) + y[-1] - 50.0, t0 + timedelta(minutes=i))
        if built:
            assert monitor.rules["drift"].statistic.h == 50
    sigma = thresholds_from_config(fit(y, ModelSpec(order=(0, 1, 1))), y, 60.0, {**config, "mode": "sigma"})
    assert sigma["drift"]["limit_abs"] == 3.15 and sigma["drift"]["horizon"] == 96
