"""The single rules on synthetic innovation sequences (no model needed).

External references: scipy.stats (normal and chi-square distributions) for
the probabilities and quantiles; Montgomery, Introduction to Statistical
Quality Control (7th ed., 2013), section 9.1.3, for the CUSUM's estimate of
the shift k + S/N.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
from scipy.stats import chi2, norm

from leadline.detector.errors import RuleError
from leadline.detector.innovation import Innovation
from leadline.detector.rules import (
    AlarmLifecycle,
    CusumRule,
    EwmaChart,
    FlatlineRule,
    LifecycleConfig,
    NoiseBurstRule,
    RangeRule,
    SpikeRule,
    StaleRule,
    TabularCusum,
)
from leadline.detector.rules.flatline import estimate_resolution, repeat_probability
from leadline.detector.rules.noise_burst import burst_limit, quadratic_form_sf

T0 = datetime(2024, 5, 1, tzinfo=timezone.utc)


def innovation(z: float, value: float | None = None, forecast: float = 0.0, variance: float = 1.0,
               step: int = 0) -> Innovation:
    sd = math.sqrt(variance)
    if value is None:
        value = forecast + z * sd
    else:
        z = (value - forecast) / sd
    return Innovation(step, value, forecast, value - forecast, variance, z, forecast - 2 * sd, forecast + 2 * sd,
                      0.95, True)


def count_episodes(rule, zs) -> list[int]:
    life = AlarmLifecycle("f", rule.name, rule.parameters(), LifecycleConfig())
    starts = []
    for i, z in enumerate(zs):
        for ev in life.step(rule.assess(innovation(float(z), step=i)), T0 + timedelta(minutes=i)):
            if ev.end is None:
                starts.append(i)
    return starts


# ------------------------------------------------------------------- spike
def test_spike_severities_and_missing():
    rule = SpikeRule(4.0, 5.0, 3.0)
    assert rule.assess(innovation(4.2)).severity == "warning"
    assert rule.assess(innovation(-5.0)).severity == "alarm"
    a = rule.assess(innovation(3.5))
    assert a.severity is None and not a.clear  # deadband
    assert rule.assess(innovation(2.9)).clear
    assert rule.assess(innovation(math.nan)) is None
    assert "5.00 sigma" in rule.assess(innovation(5.0)).detail


def test_spike_parameters_are_checked():
    with pytest.raises(RuleError, match="alarm_abs_z"):
        SpikeRule(4.0, 3.0)
    with pytest.raises(RuleError, match="clear_abs_z"):
        SpikeRule(4.0, 5.0, 4.5)
    with pytest.raises(RuleError, match="warning_abs_z"):
        SpikeRule(float("nan"), 5.0)


# ------------------------------------------------------------------- CUSUM
def test_cusum_estimates_a_deterministic_shift_exactly():
    # z = 2 every step, k = 0.5: S+ = 1.5, 3.0, 4.5 > h = 4 at step 3, N+ = 3;
    # Montgomery (2013) section 9.1.3: shift = k + S+/N+ = 0.5 + 4.5/3 = 2.0
    chart = TabularCusum(k=0.5, h=4.0)
    assert chart.update(2.0) is None and chart.update(2.0) is None
    signal = chart.update(2.0)
    assert signal.direction == 1 and signal.run_steps == 3 and signal.shift_z == pytest.approx(2.0)
    assert chart.s_hi == 0.0  # restarted after the signal
    chart = TabularCusum(k=0.5, h=4.0)
    signals = [chart.update(-3.0) for _ in range(2)]
    assert signals[1].direction == -1 and signals[1].shift_z == pytest.approx(-3.0)


def test_cusum_screening_drops_an_isolated_outlier_but_keeps_a_persistent_one():
    chart = TabularCusum(0.5, 4.0, screen_abs_z=5.0, persist_abs_z=2.0)
    # one wild reading among normal ones: never enters the sums
    for z in [0.0, 10.0, 0.1, -0.2, 0.0]:
        assert chart.update(z) is None
    assert chart.statistic < 1.0
    # the same wild reading followed by another one in the same direction: a shift
    chart = TabularCusum(0.5, 4.0, screen_abs_z=5.0)
    assert chart.update(10.0) is None
    assert chart.holding
    signal = chart.update(9.0)
    assert signal.direction == 1 and signal.run_steps == 2
    assert signal.shift_z == pytest.approx(0.5 + (9.5 + 8.5) / 2)
    # followed by a moderate reading in the same direction: the held one is released
    chart = TabularCusum(0.5, 4.0, screen_abs_z=5.0)
    chart.update(6.0)
    assert chart.update(2.5) is not None
    # followed by one in the other direction: dropped
    chart = TabularCusum(0.5, 4.0, screen_abs_z=5.0)
    chart.update(8.0)
    assert chart.update(-2.5) is None and chart.s_hi == 0.0
    # without screening the single wild reading signals at once (the contrast)
    assert TabularCusum(0.5, 4.0).update(10.0) is not None


def test_cusum_run_calls_count_missing_and_held_readings():
    chart = TabularCusum(0.5, 4.0, screen_abs_z=5.0)
    for z in [0.0, 0.0, 2.0, math.nan, 2.0]:
        assert chart.update(z) is None
    signal = chart.update(2.0)
    assert signal.run_steps == 3 and signal.run_calls == 4


def test_cusum_head_start_and_parameter_checks():
    chart = TabularCusum(0.5, 4.0, head_start=2.0)
    assert chart.s_hi == chart.s_lo == 2.0
    assert chart.update(3.0) is not None  # 2 + 3 - 0.5 > 4: the head start speeds the signal
    with pytest.raises(RuleError, match="head_start"):
        TabularCusum(0.5, 4.0, head_start=4.0)
    with pytest.raises(RuleError, match="cusum h"):
        TabularCusum(0.5, 0.0)


def test_cusum_rule_raises_once_and_clears_below_the_clear_fraction():
    rule = CusumRule(TabularCusum(0.5, 4.0), clear_fraction=0.5)
    verdicts = [rule.assess(innovation(z)) for z in [2.0, 2.0, 2.0, 0.0, 1.5, 0.0]]
    assert [v.severity for v in verdicts] == [None, None, "alarm", None, None, None]
    assert rule.assess(innovation(math.nan)) is None
    assert verdicts[3].clear and verdicts[4].clear  # S+ = 0, then 1.0 <= 2
    assert "level shift up" in verdicts[2].detail


# -------------------------------------------------------------------- EWMA
def test_ewma_signals_a_sustained_shift_and_restarts():
    chart = EwmaChart(lam=0.2, limit_sigmas=3.0)
    limit = 3.0 * math.sqrt(0.2 / 1.8)
    e, steps = 0.0, 0
    while True:
        steps += 1
        e = 0.8 * e + 0.2 * 1.5
        d = chart.update(1.5)
        if e > limit:
            assert d == 1
            break
        assert d == 0
    assert chart.value == 0.0 and steps == 5
    exact = EwmaChart(lam=0.2, limit_sigmas=3.0, exact_limits=True)
    exact.update(0.0)
    assert exact.limit() == pytest.approx(3.0 * 0.2)  # sigma_E,1 = lambda (Montgomery 2013, 9.2)


# ---------------------------------------------------------------- flatline
@pytest.mark.parametrize("prev, f, sd, w", [(0.0, 0.0, 1.0, 0.05), (10.0, 0.0, 1.0, 0.5), (-9.0, 0.0, 2.0, 0.3),
                                            (0.3, 0.0, 1.0, 1.0)])
def test_repeat_probability_matches_scipy(prev, f, sd, w):
    # scipy.stats.norm: P(prev - w <= Y <= prev + w), Y ~ N(f, sd^2); the survival
    # function keeps the far tails accurate
    lo, hi = (prev - w - f) / sd, (prev + w - f) / sd
    expected = norm.sf(lo) - norm.sf(hi) if lo > 0 else norm.cdf(hi) - norm.cdf(lo)
    assert repeat_probability(prev, f, sd, w) == pytest.approx(expected, rel=1e-9)


def _repeats_until_alarm(variance: float, half_width: float, limit: float) -> int:
    """Independent count: the first r with prod_{j<=r} p_j < limit (scipy), for y stuck at the forecast."""
    p = norm.cdf(half_width / math.sqrt(variance)) - norm.cdf(-half_width / math.sqrt(variance))
    r, log_p = 0, 0.0
    while log_p >= math.log(limit):
        r += 1
        log_p += math.log(p)
    return r


@pytest.mark.parametrize("variance", [0.25, 1.0, 25.0])
def test_flatline_alarms_when_the_run_probability_falls_below_the_limit(variance):
    rule = FlatlineRule(tolerance=0.0, resolution=0.1, run_probability_limit=1e-6)
    expected = _repeats_until_alarm(variance, 0.05, 1e-6)
    verdicts = [rule.assess(innovation(0.0, value=20.0, forecast=20.0, variance=variance))
                for _ in range(expected + 2)]
    first = next(i for i, v in enumerate(verdicts) if v.severity == "alarm")
    assert first == expected  # reading 0 starts the run, readings 1..expected repeat it
    assert "repeated" in verdicts[first].detail
    clear = rule.assess(innovation(0.0, value=20.1, forecast=20.0, variance=variance))
    assert clear.clear and rule.run_steps == 0


def test_flatline_count_depends_on_the_model_variance_not_a_fixed_number():
    counts = {v: _repeats_until_alarm(v, 0.05, 1e-6) for v in (0.25, 25.0)}
    assert counts[25.0] < counts[0.25]  # a noisy feed is flagged sooner than a quiet one


def test_flatline_far_from_the_forecast_is_implausible_at_once():
    rule = FlatlineRule(resolution=0.01, run_probability_limit=1e-6)
    rule.assess(innovation(0.0, value=5.0, forecast=0.0))
    assert rule.assess(innovation(0.0, value=5.0, forecast=0.0)).severity == "alarm"


@pytest.mark.slow
def test_flatline_false_alarm_rate_stays_below_its_limit_on_quantized_white_noise():
    # Coarsely quantized N(0, 1) readings repeat often (p about 0.2 per step),
    # yet alarms per reading must stay below the limit (Ville's inequality; flatline.py Notes).
    rng = np.random.default_rng(515)
    y = np.round(rng.standard_normal(200_000) * 2) / 2  # resolution 0.5
    limit = 1e-3
    rule = FlatlineRule(resolution=0.5, run_probability_limit=limit)
    life = AlarmLifecycle("f", "flatline")
    count = 0
    for i, v in enumerate(y):
        for ev in life.step(rule.assess(innovation(0.0, value=float(v), forecast=0.0)), T0 + timedelta(minutes=i)):
            count += ev.end is None
    assert 0 < count <= limit * y.size


def test_estimate_resolution():
    y = np.round(np.random.default_rng(3).normal(50, 2, 2000), 1)
    assert estimate_resolution(y) == pytest.approx(0.1, abs=1e-9)
    assert estimate_resolution([3.0, 3.0]) == 0.0


# ------------------------------------------------------------- noise burst
def test_saddlepoint_tail_matches_the_chi_square_when_all_weights_are_one():
    # equal weights make the quadratic form chi-square (scipy.stats.chi2)
    for df, q in ((5, 40.0), (23, 60.0), (23, 30.0)):
        assert quadratic_form_sf(q, np.ones(df)) == pytest.approx(chi2.sf(q, df), rel=0.02)


@pytest.mark.parametrize("p", [1e-2, 1e-3])
def test_burst_limit_matches_a_simulation_of_the_statistic(p):
    # 400,000 windows of 24 independent N(0, 1) values, fixed seed
    rng = np.random.default_rng(31)
    z = rng.standard_normal((400_000, 24))
    q = 0.5 * np.sum(np.diff(z, axis=1) ** 2, axis=1)
    exceed = (q > burst_limit(24, p)).mean()
    assert abs(exceed - p) < 4 * math.sqrt(p * (1 - p) / q.size)
    assert burst_limit(24, p, limit_scale=1.5) == pytest.approx(1.5 * burst_limit(24, p))


def test_noise_burst_statistic_is_blind_to_the_mean_and_nearly_to_a_step():
    rng = np.random.default_rng(21)
    z = rng.standard_normal(24)
    a, b, c = NoiseBurstRule(window=24), NoiseBurstRule(window=24), NoiseBurstRule(window=24)
    step = np.where(np.arange(24) >= 12, 6.0, 0.0)
    for v, s in zip(z, step):
        a.assess(innovation(float(v)))
        b.assess(innovation(float(v) + 4.0))  # the whole window shifted
        c.assess(innovation(float(v + s)))  # a 6-sigma step inside the window
    assert a.statistic == pytest.approx(0.5 * np.sum(np.diff(z) ** 2))
    assert b.statistic == pytest.approx(a.statistic)
    # the step adds one term, (6 + z_12 - z_11)^2 / 2 - (z_12 - z_11)^2 / 2, and stays below the limit
    assert c.statistic - a.statistic == pytest.approx(0.5 * (6 + z[12] - z[11]) ** 2 - 0.5 * (z[12] - z[11]) ** 2)
    assert c.statistic < burst_limit(24, 1e-4)


def test_winsorizing_caps_what_one_reading_adds():
    rule = NoiseBurstRule(window=24, clip_abs_z=4.0)
    for z in [0.0] * 23 + [50.0]:
        rule.assess(innovation(z))
    assert rule.statistic == pytest.approx(0.5 * 16.0)


def test_noise_burst_detects_a_tripled_spread_within_24_steps():
    rng = np.random.default_rng(22)
    found = 0
    for _ in range(40):
        zs = np.concatenate([rng.standard_normal(60), 3.0 * rng.standard_normal(24)])
        starts = count_episodes(NoiseBurstRule(window=24, tail_probability=1e-4, screen_abs_z=5.0), zs)
        found += any(s >= 60 for s in starts)
    assert found >= 38


@pytest.mark.slow
def test_noise_burst_false_alarms_stay_below_the_tail_probability():
    rng = np.random.default_rng(23)
    z = rng.standard_normal(100_000)
    starts = count_episodes(NoiseBurstRule(window=24, tail_probability=1e-3, screen_abs_z=4.5), z)
    # raise-steps are at most p per step on average; episodes are fewer still
    assert len(starts) <= 1e-3 * z.size


def test_noise_burst_ignores_a_single_screened_outlier():
    zs = [0.3, -0.2, 0.5, -0.4, 0.1, 0.0, -0.3, 0.2] * 3 + [10.0] + [0.1, -0.1] * 4
    assert count_episodes(NoiseBurstRule(window=24, tail_probability=1e-4, screen_abs_z=5.0), zs) == []
    # without screening the outlier alone looks like a burst (the contrast)
    assert count_episodes(NoiseBurstRule(window=24, tail_probability=1e-4), zs) != []


def test_noise_burst_parameter_checks():
    with pytest.raises(RuleError, match="window"):
        NoiseBurstRule(window=2)
    with pytest.raises(RuleError, match="clear_probability"):
        NoiseBurstRule(tail_probability=0.1, clear_probability=0.01)


# ------------------------------------------------------------------- stale
def test_stale_is_raised_by_the_clock_with_a_deterministic_start():
    rule = StaleRule(interval_s=60, missing_intervals=5, last_seen=T0)
    assert rule.assess(T0 + timedelta(minutes=4, seconds=59)) is None
    verdict, start = rule.assess(T0 + timedelta(minutes=7, seconds=13))
    assert verdict.severity == "alarm" and start == T0 + timedelta(minutes=5)
    assert "no reading since 2024-05-01T00:00:00+00:00" in verdict.detail
    rule.seen(T0 + timedelta(minutes=8))
    assert rule.assess(T0 + timedelta(minutes=9)) is None
    with pytest.raises(RuleError, match="interval_s"):
        StaleRule(interval_s=0)


def test_stale_backlog_catching_up_opens_nothing_and_a_gap_in_the_readings_is_one_outage():
    rule = StaleRule(interval_s=60, missing_intervals=5, last_seen=T0)
    now = T0 + timedelta(days=3)
    # the feed is silent: the clock opens one outage
    verdict, start = rule.assess(now - timedelta(seconds=1))
    assert start == T0 + timedelta(minutes=5)
    # then a head-end delivers three days late: readings arrive between every two ticks
    for minute in range(1, 200):
        assert rule.seen(T0 + timedelta(minutes=minute)) is None
        assert rule.assess(now) is None
    # a hole of 20 minutes inside the backlog is one outage, opened m intervals after the last reading
    verdict, start = rule.seen(T0 + timedelta(minutes=219))
    assert start == T0 + timedelta(minutes=204)
    assert "no reading for 20 min" in verdict.detail
    # silence after the backlog: the first tick with nothing new arrived opens it
    assert rule.assess(now) is None  # a reading arrived since the previous tick
    verdict, start = rule.assess(now + timedelta(seconds=1))
    assert start == T0 + timedelta(minutes=224)


# ------------------------------------------------------------------- range
def test_range_rule():
    rule = RangeRule(low=0.0, high=100.0)
    assert rule.assess(-0.1).severity == "alarm" and "below" in rule.assess(-0.1).detail
    assert rule.assess(100.5).severity == "alarm"
    assert rule.assess(float("inf")).severity == "alarm"
    assert rule.assess(50.0).clear
    assert rule.assess(float("nan")) is None
    assert RangeRule(high=1.0).contains(-1e9) and not RangeRule().contains(float("-inf"))
    with pytest.raises(RuleError, match="must not exceed"):
        RangeRule(2.0, 1.0)
