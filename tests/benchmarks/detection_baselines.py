"""The two baselines of bench_detection.py and the drift ceiling.

Baselines, on the same readings as leadline:

    static   fixed limits on the raw reading, centred on the median of the
             first fault-free tuning run;
    rolling  |y_t - mean| / sd over the previous ROLL readings above a limit;

each tuned on separate fault-free data to the same false-alarm rate (one
episode = a run of consecutive points beyond the limit).

Drift ceiling (:func:`drift_ceiling`)
-------------------------------------
The planted drift adds r_j = s * delta * sigma * j to the reading j = 1..W
after the onset (s = +-1). Under the true model (known orders, parameters
and, for the cycle feed, the cycle), the one-step innovations of the
unrounded readings are e_t / sigma ~ iid N(0, 1) without the fault, and
e_t / sigma + s * g_j with it, where g is the innovation signature of the
ramp: the ramp differenced d times and passed through phi(B) / theta(B)
(g = lfilter(phi, theta, (1 - B)^d ramp)). The data before the onset have
the same law under both hypotheses, so by the Neyman-Pearson lemma the most
powerful test of size alpha that uses everything up to W readings after the
onset rejects when

    S = sum_j g_j (s * innovation_j) / ||g||  >  z_{1-alpha},

and its power is Phi(||g|| - z_{1-alpha}): the matched filter that knows the
onset, the slope and its sign.

Why this bounds any detector's recall: a detector with false alarms at rate
r per reading (event starts, stationary over clean data) starts an event in
a given clean W-reading window with probability at most r W (the expected
number of starts, by Markov's inequality). "An event starts within the
window" is therefore a test of size at most alpha = r W, and its power (the
recall) cannot exceed the Neyman-Pearson power at that size. Rounding the
readings only discards information (the rounded readings are a function of
the unrounded ones), so the bound holds for the displayed readings too. It is
an upper bound, and not reachable: a real detector knows neither the onset
nor the slope, and estimates the model. The benchmark also evaluates S on
every planted drift trial from the trial's own shocks ("matched filter"), a
check that the signature matches the planted ramp.
"""

from __future__ import annotations

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy.signal import lfilter
from scipy.stats import norm

ROLL = 48


def episodes(flags: np.ndarray) -> np.ndarray:
    """Indices where a run of True starts."""
    flags = np.asarray(flags, dtype=bool)
    prev = np.concatenate([[False], flags[:-1]])
    return np.flatnonzero(flags & ~prev)


def static_scores(y: np.ndarray, centre: float) -> np.ndarray:
    return np.abs(y - centre)


def rolling_scores(y: np.ndarray) -> np.ndarray:
    """|y_t - mean| / sd over the previous ROLL readings (0 for the first ROLL)."""
    y = np.asarray(y, dtype=float)
    out = np.zeros(y.size)
    if y.size <= ROLL:
        return out
    win = sliding_window_view(y[:-1], ROLL)
    mean = win.mean(axis=1)
    sd = win.std(axis=1, ddof=1)
    dev = np.abs(y[ROLL:] - mean)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(sd > 0, dev / np.where(sd > 0, sd, 1.0), np.where(dev > 0, np.inf, 0.0))
    out[ROLL:] = z
    return out


def tune(score_sets: list[np.ndarray], target_per_1000: float) -> float:
    """The smallest limit whose episode rate on fault-free scores is at most the target."""
    total = sum(s.size for s in score_sets)
    finite = [s[np.isfinite(s)] for s in score_sets]
    lo, hi = 0.0, max(float(np.max(s)) for s in finite if s.size) + 1.0
    for _ in range(50):
        mid = 0.5 * (lo + hi)
        rate = sum(episodes(s > mid).size for s in score_sets) / total * 1000
        if rate > target_per_1000:
            lo = mid
        else:
            hi = mid
    return hi


# --------------------------------------------------------------- ceiling
def drift_signature(ar, ma, d: int, slope: float, window: int) -> np.ndarray:
    """Innovation response (units of sigma) to a ramp slope * (1, 2, ..., window) from the onset on."""
    x = slope * np.arange(1, window + 1, dtype=float)
    for _ in range(d):
        x = np.diff(np.concatenate([[0.0], x]))
    phi = np.concatenate([[1.0], -np.asarray(ar, dtype=float)])
    theta = np.concatenate([[1.0], np.asarray(ma, dtype=float)])
    return lfilter(phi, theta, x)


def drift_ceiling(ar, ma, d: int, slope: float, window: int, rate_per_1000: float) -> dict:
    """Neyman-Pearson recall bound for the planted drift (module docstring)."""
    g = drift_signature(ar, ma, d, slope, window)
    alpha = rate_per_1000 / 1000.0 * window
    snr = float(np.sqrt(g @ g))
    limit = float(norm.isf(alpha))
    return {"signature": g, "alpha": alpha, "snr": snr, "limit": limit, "power": float(norm.sf(limit - snr))}


def matched_filter_hit(ceiling: dict, shocks: np.ndarray, sign: float) -> bool:
    """S > z_{1-alpha} on one trial: the window's shocks (units of sigma) plus the signature."""
    g = ceiling["signature"]
    innov = shocks[:g.size] + sign * g
    s = float(g @ (sign * innov)) / ceiling["snr"]
    return s > ceiling["limit"]
