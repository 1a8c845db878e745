"""The CUSUM's empirical limit on autocorrelated residuals: block resampling keeps the budget."""

from __future__ import annotations

import numpy as np

from leadline.detector.rules.arl import cusum_h_for_arl
from leadline.detector.rules.tail_limits import MIN_BLOCK_LENGTH, empirical_cusum_h, stationary_block_length


def unit_ar1(phi: float, n: int, seed: int) -> np.ndarray:
    """AR(1) with unit marginal variance (so each z alone looks standard normal)."""
    rng = np.random.default_rng(seed)
    e = rng.standard_normal(n) * np.sqrt(1.0 - phi * phi)
    x = np.empty(n)
    x[0] = rng.standard_normal()
    for t in range(1, n):
        x[t] = phi * x[t - 1] + e[t]
    return x


def signal_rate(z: np.ndarray, k: float, h: float) -> float:
    """Signals per step of a two-sided tabular CUSUM that restarts after each signal."""
    hi = lo = 0.0
    signals = 0
    for v in z.tolist():
        hi = max(0.0, hi + v - k)
        lo = max(0.0, lo - v - k)
        if hi > h or lo > h:
            signals += 1
            hi = lo = 0.0
    return signals / z.size


def test_block_length_follows_the_ar1_formula_and_is_zero_for_white_noise():
    # For AR(1) with coefficient rho, G / g = 2 rho / (1 - rho^2), so the optimal stationary-bootstrap
    # block is (2 rho / (1 - rho^2))^(2/3) n^(1/3) (Politis & White 2004) [from memory]
    n = 2000
    for rho in (0.5, 0.8):
        theory = (2 * rho / (1 - rho * rho)) ** (2 / 3) * n ** (1 / 3)
        found = np.mean([stationary_block_length(unit_ar1(rho, n, seed)) for seed in range(6)])
        assert 0.6 * theory < found < 1.4 * theory, (rho, theory, found)
    white = [stationary_block_length(np.random.default_rng(s).standard_normal(n)) for s in range(6)]
    assert max(white) < MIN_BLOCK_LENGTH


def test_the_limit_keeps_the_budget_on_autocorrelated_residuals_where_single_draws_do_not():
    # the CUSUM adds up runs of one sign; the Gaussian h (Markov-chain ARL, Brook & Evans 1972) and
    # resampling single residuals both treat z as independent and overspend the budget
    k, rate = 0.5, 1e-3
    h_gauss = cusum_h_for_arl(k, 1.0 / rate)
    fresh = unit_ar1(0.3, 400_000, seed=9)
    assert signal_rate(fresh, k, h_gauss) > 3 * rate  # the independent-draw limit overspends
    # h from one training window of 2000 residuals varies with the window (its runs are a sample too):
    # the realised rate over several windows centres near the budget rather than several times it
    realised = [signal_rate(fresh, k, empirical_cusum_h(unit_ar1(0.3, 2000, seed=s), k, rate, h_gauss, seed=1))
                for s in range(6)]
    assert np.median(realised) <= 2.0 * rate, realised
    assert max(realised) < 3 * rate, realised


def test_white_residuals_keep_single_draws_and_the_same_limit():
    k, rate = 0.5, 1e-3
    h_gauss = cusum_h_for_arl(k, 1.0 / rate)
    z = np.random.default_rng(12).standard_normal(2000)
    h = empirical_cusum_h(z, k, rate, h_gauss, seed=1)
    assert h_gauss <= h < 1.1 * h_gauss
    assert 0.6 * rate < signal_rate(np.random.default_rng(13).standard_normal(400_000), k, h) <= 1.3 * rate
