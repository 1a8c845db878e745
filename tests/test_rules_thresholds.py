"""Limits from a false-alarm budget (``budget`` mode) and fixed limits (``sigma`` mode).

External references: scipy.stats (normal, Student t, numpy quantiles) for
the limits; Lucas & Crosier (1982), Table 1, for h at k = 0.5.
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
from scipy.stats import norm
from scipy.stats import t as student_t

from leadline.detector.errors import RuleError
from leadline.detector.innovation import Innovation
from leadline.detector.rules import (
    AlarmLimits,
    AlarmLifecycle,
    LifecycleConfig,
    SpikeRule,
    budget_thresholds,
    per_point_rate,
    sigma_thresholds,
    validate_thresholds,
)
from leadline.detector.rules.thresholds import DAY_S, WEEK_S, empirical_abs_limit, gaussian_abs_limit

T0 = datetime(2024, 6, 1, tzinfo=timezone.utc)


def test_per_point_rate():
    assert per_point_rate(1, WEEK_S, 60) == pytest.approx(60 / 604800)
    assert per_point_rate(2, DAY_S, 900) == pytest.approx(2 * 900 / 86400)
    with pytest.raises(RuleError, match="interval_s"):
        per_point_rate(1, WEEK_S, 0)
    with pytest.raises(RuleError, match="below 0.5"):
        per_point_rate(1000, DAY_S, 3600)


def test_gaussian_limit_is_the_two_sided_normal_quantile():
    # Montgomery, Introduction to Statistical Quality Control, 7th ed. (2013): 3-sigma limits
    # leave p = 2 (1 - Phi(3)) = 0.0026998 of normal points outside (exact formula).
    assert gaussian_abs_limit(0.0026998) == pytest.approx(3.0, abs=1e-4)
    assert gaussian_abs_limit(1e-5) == pytest.approx(norm.isf(5e-6))


def test_empirical_limit_is_the_sample_quantile_when_enough_points_lie_beyond():
    x = np.abs(np.random.default_rng(1).standard_normal(50_000))
    limit, method = empirical_abs_limit(x, 1e-3, confidence=None)
    assert method == "quantile" and limit == pytest.approx(np.quantile(x, 1 - 1e-3))


def test_pareto_tail_extrapolates_a_heavy_tail_beyond_the_sample():
    # |T| / sqrt(2) for Student t with 4 df has unit variance; its true (1 - p)
    # quantile is t.isf(p / 2, 4) / sqrt(2) (scipy.stats.t)
    rng = np.random.default_rng(2)
    x = np.abs(rng.standard_t(4, 20_000)) / math.sqrt(2)
    p = 1e-5  # n p = 0.2: far beyond the sample quantiles
    estimate, method = empirical_abs_limit(x, p, confidence=None)
    truth = student_t.isf(p / 2, 4) / math.sqrt(2)
    assert method == "pareto tail"
    assert estimate == pytest.approx(truth, rel=0.2)
    assert estimate > gaussian_abs_limit(p) + 2  # far above the normal limit
    upper, method = empirical_abs_limit(x, p, confidence=0.8)
    assert upper > estimate and "80% upper bound" in method


def test_pareto_pwm_fit_recovers_known_shapes():
    # generalized Pareto samples with known shape (scipy.stats.genpareto)
    from scipy.stats import genpareto

    from leadline.detector.rules.thresholds import _pareto_pwm

    for shape in (0.0, 0.25, -0.2):
        x = np.sort(genpareto.rvs(shape, scale=2.0, size=50_000, random_state=np.random.default_rng(9)))
        xi, sigma = _pareto_pwm(x)
        assert xi == pytest.approx(shape, abs=0.03) and sigma == pytest.approx(2.0, rel=0.04)


def test_budget_limits_never_fall_below_the_gaussian_limit():
    # uniform residuals with unit variance have a short tail: the empirical
    # limit is lower, and the Gaussian one must be used
    z = np.random.default_rng(3).uniform(-math.sqrt(3), math.sqrt(3), 5000)
    th = budget_thresholds(z, interval_s=60, false_alarms=1, per_s=DAY_S)
    assert th["noise_burst"]["limit_scale"] == 1.0
    sp = th["spike"]
    assert sp["empirical_warning_abs_z"] < sp["gaussian_warning_abs_z"]
    assert sp["warning_abs_z"] == sp["gaussian_warning_abs_z"]
    p = per_point_rate(1, DAY_S, 60)
    assert sp["gaussian_warning_abs_z"] == pytest.approx(norm.isf(p * 0.35 / 2))
    assert sp["gaussian_alarm_abs_z"] == pytest.approx(norm.isf(p * 0.35 * 0.1 / 2))
    assert th["cusum"]["h"] >= th["cusum"]["gaussian_h"]


def test_budget_thresholds_are_json_serialisable_and_validated():
    z = np.random.default_rng(4).standard_normal(3000)
    th = budget_thresholds(z, interval_s=300, false_alarms=1, per_s=WEEK_S, ewma_lam=0.1,
                           values=np.round(z * 3 + 40, 1))
    again = json.loads(json.dumps(th.to_json()))
    assert validate_thresholds(again) == th and AlarmLimits.from_json(again).to_json() == again
    assert th["flatline"]["resolution"] == pytest.approx(0.1)
    assert th["ewma"]["lam"] == 0.1 and th["ewma"]["limit_sigmas"] > 2
    shares = th.budget["shares"]
    assert sum(shares.values()) == pytest.approx(1.0)


def test_sigma_thresholds_match_lucas_crosier_h():
    th = sigma_thresholds(cusum_k=0.5, cusum_h=4.0, cusum_clip_abs_z=None)
    assert th.mode == "sigma" and th["cusum"] == {"k": 0.5, "h": 4.0, "clip_abs_z": None}


@pytest.mark.parametrize("mutate, message", [
    (lambda d: d.pop("spike"), "section 'spike'"),
    (lambda d: d["cusum"].update(h="4"), "'cusum.h'"),
    (lambda d: d.update(mode="guess"), "'mode'"),
    (lambda d: d.update(format_version=99), "format_version 99"),
    (lambda d: d["noise_burst"].update(window=float("nan")), "'noise_burst.window'"),
])
def test_bad_thresholds_name_the_key(mutate, message):
    th = sigma_thresholds().to_json()
    mutate(th)
    with pytest.raises(RuleError, match=message):
        validate_thresholds(th)


def test_bad_budget_shares_are_refused():
    z = np.random.default_rng(5).standard_normal(500)
    with pytest.raises(RuleError, match="unknown rules"):
        budget_thresholds(z, interval_s=60, shares={"spike": 0.5, "wobble": 0.5})
    with pytest.raises(RuleError, match="sum to at most 1"):
        budget_thresholds(z, interval_s=60, shares={"spike": 0.8, "cusum": 0.8, "noise_burst": 0.1,
                                                     "flatline": 0.1})


def _spike_episodes(z: np.ndarray, warning: float, alarm: float) -> int:
    rule = SpikeRule(warning, max(alarm, warning))
    life = AlarmLifecycle("feed/t4", "spike", rule.parameters(), LifecycleConfig(1, 1, 3))
    count = 0
    for i, v in enumerate(z):
        inn = Innovation(i, float(v), 0.0, float(v), 1.0, float(v), -2.0, 2.0, 0.95, True)
        count += sum(ev.end is None for ev in life.step(rule.assess(inn), T0 + timedelta(minutes=i)))
    return count


def test_budget_mode_keeps_heavy_tailed_false_alarms_within_the_budget():
    # 10,000 clean readings with Student t (4 df) innovations, scaled to unit
    # variance as a fitted model's standardized residuals are. Budget: one
    # false alarm per day at a 60 s interval, of which the spike rule has its
    # share. "Within the budget" allows the Poisson noise of the count (3 SE).
    rng = np.random.default_rng(44)
    train = rng.standard_t(4, 5000)
    train /= train.std()
    clean = rng.standard_t(4, 10_000) / math.sqrt(2)
    th = budget_thresholds(train, interval_s=60, false_alarms=1, per_s=DAY_S)
    budget = th.budget["per_point_rate"] * th.budget["shares"]["spike"] * clean.size
    allowed = budget + 3 * math.sqrt(budget)
    sp = th["spike"]
    assert th["noise_burst"]["limit_scale"] > 1.0  # heavier tails than normal: wider noise-burst limits
    ours = _spike_episodes(clean, sp["warning_abs_z"], sp["alarm_abs_z"])
    gaussian = _spike_episodes(clean, sp["gaussian_warning_abs_z"], sp["gaussian_alarm_abs_z"])
    assert ours <= allowed
    assert gaussian > 3 * allowed  # a Gaussian limit at the same nominal rate blows the budget
