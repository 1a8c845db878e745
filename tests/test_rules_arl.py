"""Run lengths of the charts against published tables.

Sources:
- Shewhart +-3 sigma: ARL = 1 / p, p the probability of a point beyond the
  limits (Montgomery, Introduction to Statistical Quality Control, 7th ed.,
  Wiley 2013, the average run length of the Shewhart chart); for normal data
  p = 2 (1 - Phi(3)) = 0.0026998, so ARL0 = 370.4 (exact).
- Two-sided tabular CUSUM, k = 0.5, h = 4: Lucas & Crosier (1982), "Fast
  initial response for CUSUM quality-control schemes", Technometrics 24(3),
  199-205, Table 1: ARL 168 at shift 0, 8.38 at shift 1; with a head start of
  h/2: 149 and 5.29.
- EWMA with asymptotic limits, lambda = 0.5, L = 3.071: Lucas & Saccucci
  (1990), "Exponentially weighted moving average control schemes: properties
  and enhancements", Technometrics 32(1), 1-12, Table 3: ARL 500 at shift 0,
  17.5 at shift 1.

The Monte Carlo checks run the same step functions as the rules (a separate
test holds the rule classes to those functions step by step), many runs side
by side with numpy, fixed seeds, and accept the table value within 3
standard errors of the mean run length.
"""

from __future__ import annotations

import numpy as np
import pytest

from leadline.detector.rules import EwmaChart, TabularCusum, cusum_arl, ewma_arl, shewhart_arl
from leadline.detector.rules.arl import (
    cusum_h_for_arl,
    cusum_one_sided_arl,
    ewma_limit_for_arl,
    siegmund_one_sided_arl,
)
from leadline.detector.rules.cusum import cusum_step
from leadline.detector.rules.ewma import ewma_sigma, ewma_step
from leadline.detector.rules.thresholds import gaussian_abs_limit


# --------------------------------------------------------------- computed ARLs
def test_shewhart_arl_formula():
    # Montgomery (2013), ARL = 1 / p: 1 / (2 (1 - Phi(3))) = 370.4; at a shift of 1 sigma
    # p = Phi(-4) + 1 - Phi(2) = 0.02278, ARL 43.9 (exact formula)
    assert shewhart_arl(3.0) == pytest.approx(370.4, abs=0.05)
    assert shewhart_arl(3.0, 1.0) == pytest.approx(43.9, abs=0.05)
    assert gaussian_abs_limit(1 / 370.4) == pytest.approx(3.0, abs=1e-4)


@pytest.mark.parametrize("shift, table", [(0, 168), (0.5, 26.6), (1, 8.38), (2, 3.34), (3, 2.19)])
def test_cusum_markov_chain_matches_lucas_crosier_table_1(shift, table):
    # Lucas & Crosier (1982), Table 1, k = 0.5, h = 4 (zero start)
    assert cusum_arl(0.5, 4.0, shift) == pytest.approx(table, rel=0.005)


def test_cusum_siegmund_approximation_is_close_to_the_table():
    # Siegmund (1985) via Montgomery (2013) section 9.1.7: two-sided ARL0 ~ 169 against 168
    one_sided = siegmund_one_sided_arl(0.5, 4.0)
    assert 1 / (2 / one_sided) == pytest.approx(168, rel=0.02)


def test_cusum_h_for_arl_inverts_the_arl():
    h = cusum_h_for_arl(0.5, 168.0)
    assert h == pytest.approx(4.0, abs=0.01)  # Lucas & Crosier (1982), Table 1
    assert cusum_arl(0.5, cusum_h_for_arl(0.5, 10_000.0)) == pytest.approx(10_000.0, rel=1e-4)


@pytest.mark.parametrize("lam, L, shift, table", [
    (0.5, 3.071, 0, 500), (0.5, 3.071, 1, 17.5), (0.5, 3.071, 2, 3.63),
    (0.03, 2.437, 0, 500), (0.03, 2.437, 1, 12.6),
])
def test_ewma_markov_chain_matches_lucas_saccucci_table_3(lam, L, shift, table):
    # Lucas & Saccucci (1990), Table 3, asymptotic limits, zero start
    assert ewma_arl(lam, L, shift) == pytest.approx(table, rel=0.01)


def test_ewma_limit_for_arl_inverts_the_arl():
    assert ewma_limit_for_arl(0.5, 500.0) == pytest.approx(3.071, abs=0.003)  # Lucas & Saccucci (1990)


@pytest.mark.slow
def test_winsorized_cusum_markov_chain_matches_monte_carlo():
    # No table covers the winsorized chart, so the chain is checked by
    # simulation of the same chart (z clipped at +-2, k = 0.5, h = 4).
    init, step = _cusum_mc(0.5, 4.0, clip=2.0)
    for shift, runs, seed in ((0.0, 5_000, 221), (1.0, 20_000, 222)):
        _assert_within_3_se(_run_lengths(runs, seed, shift, init, step), cusum_arl(0.5, 4.0, shift, clip=2.0))
    assert cusum_arl(0.5, 4.0, 0.0, clip=2.0) > 1.2 * cusum_arl(0.5, 4.0, 0.0)  # clipping matters at c = 2


def test_one_sided_cusum_head_start_shortens_the_in_control_arl():
    # both one-sided ARLs start lower with a head start (Lucas & Crosier 1982)
    assert cusum_one_sided_arl(0.5, 4.0, 0.0, head_start=2.0) < cusum_one_sided_arl(0.5, 4.0, 0.0)


# ---------------------------------------------- the classes equal the functions
@pytest.mark.parametrize("clip", [None, 2.0])
def test_tabular_cusum_class_follows_cusum_step_exactly(clip):
    rng = np.random.default_rng(11)
    z = rng.standard_normal(5000) + 0.3
    chart = TabularCusum(k=0.5, h=4.0, clip_abs_z=clip)
    s_hi = s_lo = 0.0
    for value in z:
        s_hi, s_lo = cusum_step(s_hi, s_lo, value if clip is None else np.clip(value, -clip, clip), 0.5)
        signal = chart.update(float(value))
        if s_hi > 4.0 or s_lo > 4.0:
            assert signal is not None
            assert signal.direction == (1 if s_hi >= s_lo else -1)
            s_hi = s_lo = 0.0
        else:
            assert signal is None
        assert chart.s_hi == pytest.approx(float(s_hi), abs=1e-12)
        assert chart.s_lo == pytest.approx(float(s_lo), abs=1e-12)


def test_ewma_class_follows_ewma_step_exactly():
    rng = np.random.default_rng(12)
    chart = EwmaChart(lam=0.5, limit_sigmas=3.071)
    limit = 3.071 * ewma_sigma(0.5)
    e = 0.0
    for value in rng.standard_normal(5000) + 0.2:
        e = ewma_step(e, value, 0.5)
        direction = chart.update(float(value))
        if abs(e) > limit:
            assert direction == (1 if e > 0 else -1)
            e = 0.0
        else:
            assert direction == 0
            assert chart.value == pytest.approx(float(e), abs=1e-12)


# ----------------------------------------------------------- Monte Carlo ARLs
def _run_lengths(n_runs: int, seed: int, shift: float, init, step, max_steps: int = 200_000) -> np.ndarray:
    """Run n_runs charts side by side until each signals; return their run lengths."""
    rng = np.random.default_rng(seed)
    state = init(n_runs)
    alive = np.arange(n_runs)
    lengths = np.zeros(n_runs, dtype=np.int64)
    t = 0
    while alive.size and t < max_steps:
        t += 1
        z = rng.standard_normal(alive.size) + shift
        state, signal = step(state, z)
        if signal.any():
            lengths[alive[signal]] = t
            keep = ~signal
            alive = alive[keep]
            state = tuple(s[keep] for s in state)
    assert alive.size == 0, "some runs never signalled"
    return lengths


def _assert_within_3_se(lengths: np.ndarray, table: float) -> None:
    mean = lengths.mean()
    se = lengths.std(ddof=1) / np.sqrt(lengths.size)
    assert abs(mean - table) < 3 * se, f"mean run length {mean:.2f} +- {se:.2f} vs table {table}"


@pytest.mark.slow
def test_monte_carlo_shewhart_arl0_is_370_4():
    # exact formula: ARL0 = 370.4 at 3 sigma; the limit comes from our own inversion
    limit = gaussian_abs_limit(0.0026998)

    def step(state, z):
        return state, np.abs(z) >= limit

    lengths = _run_lengths(20_000, seed=101, shift=0.0, init=lambda n: (np.zeros(n),), step=step)
    _assert_within_3_se(lengths, 370.4)


def _cusum_mc(k: float, h: float, head_start: float = 0.0, clip: float | None = None):
    def init(n):
        return np.full(n, head_start), np.full(n, head_start)

    def step(state, z):
        if clip is not None:
            z = np.clip(z, -clip, clip)
        s_hi, s_lo = cusum_step(state[0], state[1], z, k)
        return (s_hi, s_lo), (s_hi > h) | (s_lo > h)

    return init, step


@pytest.mark.slow
@pytest.mark.parametrize("shift, table, runs, seed", [(0.0, 168, 5_000, 201), (1.0, 8.38, 20_000, 202)])
def test_monte_carlo_two_sided_cusum_matches_lucas_crosier(shift, table, runs, seed):
    # Lucas & Crosier (1982), Table 1, k = 0.5, h = 4
    init, step = _cusum_mc(0.5, 4.0)
    _assert_within_3_se(_run_lengths(runs, seed, shift, init, step), table)


@pytest.mark.slow
@pytest.mark.parametrize("shift, table, runs, seed", [(0.0, 149, 5_000, 211), (1.0, 5.29, 20_000, 212)])
def test_monte_carlo_cusum_with_head_start_matches_lucas_crosier(shift, table, runs, seed):
    # Lucas & Crosier (1982), Table 1, head start h/2 = 2
    init, step = _cusum_mc(0.5, 4.0, head_start=2.0)
    _assert_within_3_se(_run_lengths(runs, seed, shift, init, step), table)


@pytest.mark.slow
@pytest.mark.parametrize("shift, table, runs, seed", [(0.0, 500, 5_000, 301), (1.0, 17.5, 20_000, 302)])
def test_monte_carlo_ewma_matches_lucas_saccucci(shift, table, runs, seed):
    # Lucas & Saccucci (1990), Table 3, lambda = 0.5, L = 3.071, asymptotic limits
    lam, limit = 0.5, 3.071 * ewma_sigma(0.5)

    def step(state, z):
        e = ewma_step(state[0], z, lam)
        return (e,), np.abs(e) > limit

    _assert_within_3_se(_run_lengths(runs, seed, shift, lambda n: (np.zeros(n),), step), table)


@pytest.mark.slow
def test_monte_carlo_rule_class_in_control_rate_with_screening():
    # The live CUSUM holds back readings at or beyond the spike alarm limit.
    # On normal input that changes the run length very little: the signal
    # rate must stay within 3 SE of 1/168 (Lucas & Crosier 1982, Table 1).
    rng = np.random.default_rng(401)
    z = rng.standard_normal(400_000)
    chart = TabularCusum(0.5, 4.0, screen_abs_z=4.4)
    signals = sum(chart.update(float(v)) is not None for v in z)
    expected = z.size / 168
    assert abs(signals - expected) < 3 * np.sqrt(expected)
