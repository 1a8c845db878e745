"""Seeded simulation of ARIMA feeds, for tests, benchmarks and the demo.

Notes
-----
An ARMA(p, q) series with mean mu solves
phi(L) (x_t - mu) = theta(L) e_t, e_t ~ N(0, sigma^2), computed with a
linear filter (``scipy.signal.lfilter``) after a burn-in of 500 steps so the
start-up transient is gone. ARIMA(p, d, q) integrates it d times
(cumulative sums), and a drift adds ``drift * t`` per difference level.
Sign conventions follow statsmodels: phi(L) = 1 - phi_1 L - ...,
theta(L) = 1 + theta_1 L + ...
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from scipy.signal import lfilter

BURN_IN = 500


def _lag_polynomial(coefs: Sequence[float], sign: float, period: int = 1) -> np.ndarray:
    """Coefficients in L of 1 + sign * (c_1 L^period + c_2 L^(2 period) + ...)."""
    poly = np.zeros(len(coefs) * period + 1)
    poly[0] = 1.0
    for i, c in enumerate(coefs, start=1):
        poly[i * period] = sign * c
    return poly


def simulate_arima(
    n: int,
    ar: Sequence[float] = (),
    ma: Sequence[float] = (),
    d: int = 0,
    *,
    seasonal_ar: Sequence[float] = (),
    seasonal_ma: Sequence[float] = (),
    seasonal_d: int = 0,
    period: int = 0,
    mean: float = 0.0,
    drift: float = 0.0,
    sigma: float = 1.0,
    seed: int,
    shocks: np.ndarray | None = None,
) -> np.ndarray:
    """Simulate n readings of an ARIMA(p, d, q) process.

    Parameters
    ----------
    ar, ma : sequence of float
        phi_1..phi_p and theta_1..theta_q in statsmodels' sign convention.
    d : int
        Number of integrations.
    seasonal_ar, seasonal_ma, seasonal_d, period : optional
        A multiplicative seasonal part Phi(L^s), Theta(L^s) and D seasonal
        integrations y_t = y_{t-s} + x_t, with s = ``period``.
    mean : float
        Mean of the stationary part (d = 0) or starting level (d >= 1).
    drift : float
        Constant added to the d-th difference each step.
    sigma : float
        Standard deviation of the shocks (ignored when ``shocks`` is given).
    seed : int
        Seed of the generator; every simulation is reproducible.
    shocks : ndarray, optional
        Use these shocks (length n + 500) instead of Gaussian ones, for
        example Student-t draws.
    """
    rng = np.random.default_rng(seed)
    total = n + BURN_IN
    e = rng.normal(0.0, sigma, total) if shocks is None else np.asarray(shocks, dtype=float)
    if e.shape != (total,):
        raise ValueError(f"shocks must have length n + {BURN_IN} = {total}")
    ar_poly = _lag_polynomial(ar, -1.0)
    ma_poly = _lag_polynomial(ma, 1.0)
    if seasonal_ar or seasonal_ma or seasonal_d:
        if period < 2:
            raise ValueError("a seasonal part needs period >= 2")
        ar_poly = np.polymul(ar_poly[::-1], _lag_polynomial(seasonal_ar, -1.0, period)[::-1])[::-1]
        ma_poly = np.polymul(ma_poly[::-1], _lag_polynomial(seasonal_ma, 1.0, period)[::-1])[::-1]
    x = lfilter(ma_poly, ar_poly, e)[BURN_IN:]
    x = x + drift
    for _ in range(seasonal_d):
        out = x.copy()
        for t in range(period, out.size):
            out[t] = out[t - period] + x[t]
        x = out
    if d == 0:
        return x + mean
    for _ in range(d):
        x = np.cumsum(x)
    return x + mean
