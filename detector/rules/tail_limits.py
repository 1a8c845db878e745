"""Tail limits from training residuals: rates per reading, Gaussian and empirical limits.

The statistics behind budget mode (:mod:`.thresholds`, whose Notes give the
equations and their sources): the per-reading rate of a budget, the
Gaussian |z| limit, the empirical upper quantile of |z| with a generalized
Pareto tail and a bootstrap upper bound, and the resampled CUSUM decision
interval and noise-burst limit scale.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.stats import norm

from ..errors import RuleError

from ..durations import DAY_S, WEEK_S  # noqa: E402,F401 (one definition, in durations)
#: Tail excesses used for the Pareto fit: the top 5%, at least this many.
MIN_TAIL_POINTS = 50
#: Fewest residuals for which an empirical limit is attempted at all.
MIN_RESIDUALS = 200


def per_point_rate(false_alarms: float, per_s: float, interval_s: float) -> float:
    """The false-alarm rate per reading for ``false_alarms`` per ``per_s`` seconds."""
    for name, value in (("false_alarms", false_alarms), ("per_s", per_s), ("interval_s", interval_s)):
        if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
            raise RuleError(f"budget {name} must be a finite number > 0, got {value!r}")
    p = float(false_alarms) * float(interval_s) / float(per_s)
    if p >= 0.5:
        raise RuleError(f"budget of {false_alarms} false alarms per {per_s} s at interval {interval_s} s is "
                        f"{p:.3g} per reading; it must be below 0.5")
    return p


def gaussian_abs_limit(rate: float) -> float:
    """c with P(|z| >= c) = rate for z ~ N(0, 1)."""
    return float(norm.isf(rate / 2.0))


def _pareto_pwm(excess: np.ndarray) -> tuple[float, float]:
    """(shape xi, scale sigma) of a generalized Pareto fit by probability-weighted moments.

    ``excess`` sorted ascending, along the last axis (one fit per row).
    """
    m = excess.shape[-1]
    weights = (m - 1 - np.arange(m)) / (m - 1)
    a0 = excess.mean(axis=-1)
    a1 = (excess * weights).mean(axis=-1)
    d = a0 - 2 * a1
    with np.errstate(divide="ignore", invalid="ignore"):
        xi = 2.0 - a0 / d
        sigma = 2.0 * a0 * a1 / d
    return xi, sigma


def _tail_quantiles(sorted_x: np.ndarray, rate: float) -> np.ndarray:
    """Upper (1 - rate) quantile per row of ``sorted_x`` (rows sorted ascending); see the Notes."""
    n = sorted_x.shape[-1]
    if n * rate >= 10:
        return np.quantile(sorted_x, 1.0 - rate, axis=-1)
    n_tail = min(n // 2, max(MIN_TAIL_POINTS, int(math.ceil(0.05 * n))))
    u = sorted_x[..., n - n_tail - 1]
    excess = sorted_x[..., n - n_tail:] - u[..., None]
    xi, sigma = _pareto_pwm(excess)
    q = rate / (n_tail / n)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        tail = np.where(np.abs(xi) < 1e-9, -sigma * np.log(q), sigma / xi * (q ** (-xi) - 1.0))
    # a fit that failed (or a bounded tail ending below the target) falls back to the sample maximum
    bad = ~np.isfinite(tail) | (sigma <= 0)
    return np.where(bad, sorted_x[..., -1], u + np.maximum(tail, 0.0))


def empirical_abs_limit(abs_z: np.ndarray, rate: float, confidence: float | None = 0.8, seed: int = 0,
                        resamples: int = 200) -> tuple[float, str]:
    """The upper (1 - rate) quantile of |z|: sample quantile or Pareto tail, as an upper bound.

    Parameters
    ----------
    abs_z : ndarray
        |z| of the training residuals.
    rate : float
        The exceedance probability.
    confidence : float or None
        Return this upper percentile of the estimate over bootstrap
        resamples (fixed ``seed``); None returns the point estimate.

    Returns
    -------
    limit : float
        NaN when there are too few residuals.
    method : str
        ``"quantile"``, ``"pareto tail"`` or ``"too few residuals"``, with the
        confidence of the bound.
    """
    x = np.sort(np.asarray(abs_z, dtype=float)[np.isfinite(abs_z)])
    n = x.size
    if n < MIN_RESIDUALS:
        return math.nan, "too few residuals"
    method = "quantile" if n * rate >= 10 else "pareto tail"
    if confidence is None:
        return float(_tail_quantiles(x, rate)), method
    rng = np.random.default_rng(seed)
    estimates = []
    for chunk in range(0, resamples, 50):
        draws = np.sort(rng.choice(x, size=(min(50, resamples - chunk), n)), axis=1)
        estimates.append(_tail_quantiles(draws, rate))
    return float(np.quantile(np.concatenate(estimates), confidence)), f"{method}, {confidence:.0%} upper bound"


def _clip(z: np.ndarray, c: float | None) -> np.ndarray:
    return z if c is None else np.clip(z, -c, c)


def stationary_block_length(z: np.ndarray) -> float:
    """The expected block length of a stationary bootstrap of ``z``, chosen from its autocorrelation.

    Notes
    -----
    The automatic choice of Politis & White (2004), with the correction of
    Patton, Politis & White (2009) [from memory]. With R(k) the sample
    autocovariances, m the smallest lag after which K_n = max(5,
    sqrt(log10 n)) successive autocorrelations are all within
    2 sqrt(log10 n / n), M = 2m and the flat-top kernel lambda(t) (1 for
    |t| <= 1/2, 2(1 - |t|) up to 1, 0 beyond),

    .. math::

        G = \\sum_{|k| \\le M} \\lambda(k/M)\\,|k|\\,R(k), \\quad
        g = \\sum_{|k| \\le M} \\lambda(k/M)\\,R(k), \\quad
        b = \\left(\\frac{G^2}{g^2}\\right)^{1/3} n^{1/3},

    capped at min(3 sqrt(n), n/3). White residuals give m = 0 and b = 0:
    the caller then resamples single residuals.
    """
    x = np.asarray(z, dtype=float)
    x = x[np.isfinite(x)]
    n = x.size
    if n < 8:
        return 0.0
    x = x - x.mean()
    r0 = float(x @ x) / n
    if r0 <= 0:
        return 0.0
    k_n = max(5, int(math.ceil(math.sqrt(math.log10(n)))))
    m_max = int(math.ceil(math.sqrt(n))) + k_n
    lags = min(m_max + k_n, n - 1)
    acov = np.array([float(x[:n - k] @ x[k:]) / n for k in range(lags + 1)])
    small = np.abs(acov[1:] / r0) < 2.0 * math.sqrt(math.log10(n) / n)  # small[j - 1] for lag j
    m = m_max
    for start in range(0, lags - k_n + 1):
        if small[start:start + k_n].all():
            m = start
            break
    big_m = min(2 * m, lags)
    if big_m == 0:
        return 0.0
    k = np.arange(1, big_m + 1)
    t = k / big_m
    weight = np.where(t <= 0.5, 1.0, 2.0 * (1.0 - t))
    g_big = 2.0 * float(np.sum(weight * k * acov[1:big_m + 1]))
    g_zero = r0 + 2.0 * float(np.sum(weight * acov[1:big_m + 1]))
    if g_zero <= 0:
        return 0.0
    b = (g_big * g_big / (g_zero * g_zero)) ** (1.0 / 3.0) * n ** (1.0 / 3.0)
    return float(min(b, 3.0 * math.sqrt(n), n / 3.0))


def _stationary_draws(z: np.ndarray, steps: int, chains: int, mean_block: float,
                      rng: np.random.Generator) -> np.ndarray:
    """``steps`` x ``chains`` values of ``z`` by the stationary bootstrap (Politis & Romano 1994).

    Each chain starts at a random residual and moves to the next one (the
    series read as a circle), jumping to a new random start with
    probability 1 / ``mean_block`` at each step: blocks of geometric length
    that keep the residuals' short-range dependence.
    """
    n = z.size
    out = np.empty((steps, chains))
    index = rng.integers(0, n, chains)
    jump = 1.0 / mean_block
    for row in range(steps):
        if row:
            index = np.where(rng.random(chains) < jump, rng.integers(0, n, chains), (index + 1) % n)
        out[row] = z[index]
    return out


#: Below this expected block length the CUSUM limit resamples single residuals.
MIN_BLOCK_LENGTH = 1.5


def empirical_cusum_h(z: np.ndarray, k: float, rate: float, h_start: float, seed: int = 0,
                      max_steps: int = 4_000_000, clip_abs_z: float | None = None) -> float:
    """The smallest h (>= h_start) whose CUSUM signal rate on resampled ``z`` is at most ``rate``.

    Resamples (fixed ``seed``), runs many two-sided CUSUMs side by side with
    restarts after each signal, and raises h by bisection. Residuals that
    are autocorrelated (a model that misses part of a daily shape leaves
    runs of one sign) are resampled in blocks by the stationary bootstrap,
    its block length from :func:`stationary_block_length`, because a CUSUM
    adds up exactly such runs: single draws would hide them and set h too
    low for the budget. White residuals are drawn one by one.
    """
    z = np.asarray(z, dtype=float)
    z = z[np.isfinite(z)]
    if z.size < MIN_RESIDUALS:
        return h_start
    rng = np.random.default_rng(seed)
    total = int(min(max_steps, max(200_000, 60.0 / rate)))
    chains = 2000
    steps = max(1, total // chains)
    block = stationary_block_length(z)
    if block < MIN_BLOCK_LENGTH:
        draws = _clip(rng.choice(z, size=(steps, chains)), clip_abs_z)
    else:
        draws = _clip(_stationary_draws(z, steps, chains, block, rng), clip_abs_z)

    def rate_at(h: float) -> float:
        # cusum_step's max(0, S+ + z - k), max(0, S- - z - k), the same operations in place
        s_hi = np.zeros(chains)
        s_lo = np.zeros(chains)
        hit = np.empty(chains, dtype=bool)
        hit_lo = np.empty(chains, dtype=bool)
        signals = 0
        for row in draws:
            np.add(s_hi, row, out=s_hi)
            np.subtract(s_hi, k, out=s_hi)
            np.maximum(0.0, s_hi, out=s_hi)
            np.subtract(s_lo, row, out=s_lo)
            np.subtract(s_lo, k, out=s_lo)
            np.maximum(0.0, s_lo, out=s_lo)
            np.greater(s_hi, h, out=hit)
            np.greater(s_lo, h, out=hit_lo)
            np.logical_or(hit, hit_lo, out=hit)
            if hit.any():
                signals += int(hit.sum())
                s_hi[hit] = 0.0
                s_lo[hit] = 0.0
        return signals / (steps * chains)

    if rate_at(h_start) <= rate:
        return h_start
    lo, hi = h_start, h_start * 2.0
    while rate_at(hi) > rate and hi < 60:
        lo, hi = hi, hi * 1.5
    for _ in range(12):
        mid = 0.5 * (lo + hi)
        if rate_at(mid) > rate:
            lo = mid
        else:
            hi = mid
    return hi
