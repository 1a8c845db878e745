"""Alarm limits for one feed: fixed (``sigma`` mode) or from a false-alarm budget (``budget`` mode).

In ``budget`` mode the user states how many false alarms per period a feed
may raise (for example one per week). With the feed's nominal interval this
becomes a rate per reading, shared among the rules; each rule's limit is
then set so that its own false-alarm rate stays within its share, judged by
the *training* standardized residuals, and never below the limit that
normal innovations would need for the same rate. The result is a plain,
JSON-serialisable dict, stored with the model.

Notes
-----
Per-reading rate, with ``false_alarms`` per ``per_s`` seconds:

.. math::

    p = \\text{false\\_alarms} \\cdot \\text{interval\\_s} / \\text{per\\_s}

and rule r gets p_r = share_r * p.

*Spike.* The Gaussian limit is c_G = Phi^{-1}(1 - p_r / 2). The empirical
limit c_E is the upper (1 - p_r) quantile of |z| over the training residuals.
When fewer than 10 residuals are expected beyond it (n p_r < 10), the tail
is extrapolated by a generalized Pareto distribution fitted to the excesses
over a high threshold u (peaks over threshold; Pickands 1975; Coles, An
Introduction to Statistical Modeling of Extreme Values, 2001, section 4.3):

.. math::

    c_E = u + \\frac{\\sigma}{\\xi}\\left[\\left(\\frac{p_r}{\\zeta_u}\\right)^{-\\xi} - 1\\right],

with zeta_u the fraction of residuals above u (the top 5%, at least 50),
and sigma, xi estimated by probability-weighted moments (Hosking & Wallis
1987, Technometrics 29) [from memory]: with a_0 the mean excess and a_1 the
mean of x_(i) (m - i) / (m - 1) over the m sorted excesses,
xi = 2 - a_0 / (a_0 - 2 a_1) and sigma = 2 a_0 a_1 / (a_0 - 2 a_1).
A tail quantile from a few thousand residuals is uncertain, and an
underestimate spends the budget: c_E is the ``confidence`` (default 80%)
upper bound of the estimate over bootstrap resamples of the residuals
(Efron & Tibshirani 1993, percentile interval). The limit is max(c_G, c_E).
Warnings use p_r, alarms p_r * alarm_rate_ratio; each episode is counted
once whatever its severity, so the warning level carries the budget.

*CUSUM* on z winsorized at +-``cusum_clip_abs_z``. h_G solves ARL_0(k, h) =
1 / p_r for the winsorized chart by the Markov chain of :mod:`.arl`; h_E is
found by running the chart on bootstrap resamples of the training
residuals (extreme ones screened out as the live rule does) until its
signal rate is at most p_r. h = max(h_G, h_E).

*EWMA* (optional): L solves ARL_0(lambda, L) = 1 / p_r (Gaussian only).

*Noise burst.* Upper tail probability p_r of the successive-difference
statistic; ``limit_scale`` = max(1, Q_E / Q_G) with Q_G its normal-theory
quantile and Q_E the same tail quantile over windows of w winsorized
residuals drawn at random from the training residuals (:mod:`.noise_burst`).

*Flatline.* The run probability limit is p_r itself (see :mod:`.flatline`
for why this bounds the rate); the readings' quantization step, estimated
from the training readings when given, is stored as its resolution.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy.stats import norm

from ..durations import DAY_S, WEEK_S  # noqa: F401 (DAY_S re-exported: one definition, in durations)
from ..errors import RuleError
from .arl import cusum_h_for_arl, ewma_limit_for_arl
from .flatline import estimate_resolution

FORMAT = "leadline.thresholds"
FORMAT_VERSION = 1

#: How the per-reading budget is shared by default (common practice here:
#: most to the two rules that see most faults).
DEFAULT_SHARES = {"spike": 0.35, "cusum": 0.35, "noise_burst": 0.15, "flatline": 0.15}
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


def noise_limit_scale(z: np.ndarray, window: int, rate: float, clip_abs_z: float | None, seed: int = 0,
                      windows: int = 100_000) -> float:
    """max(1, Q_E / Q_G) from windows of resampled residuals (see the Notes)."""
    from .noise_burst import burst_limit

    z = np.asarray(z, dtype=float)
    z = z[np.isfinite(z)]
    if z.size < MIN_RESIDUALS:
        return 1.0
    rng = np.random.default_rng(seed)
    q = []
    for chunk in range(0, windows, 20_000):
        draws = _clip(rng.choice(z, size=(min(20_000, windows - chunk), window)), clip_abs_z)
        q.append(0.5 * (np.diff(draws, axis=1) ** 2).sum(axis=1))
    q_emp = float(_tail_quantiles(np.sort(np.concatenate(q)), rate))
    return max(1.0, q_emp / burst_limit(window, rate))


def empirical_cusum_h(z: np.ndarray, k: float, rate: float, h_start: float, seed: int = 0,
                      max_steps: int = 4_000_000, clip_abs_z: float | None = None) -> float:
    """The smallest h (>= h_start) whose CUSUM signal rate on resampled ``z`` is at most ``rate``.

    Resamples with replacement (fixed ``seed``), runs many two-sided CUSUMs
    side by side with restarts after each signal, and raises h by bisection.
    """
    z = np.asarray(z, dtype=float)
    z = z[np.isfinite(z)]
    if z.size < MIN_RESIDUALS:
        return h_start
    rng = np.random.default_rng(seed)
    total = int(min(max_steps, max(200_000, 60.0 / rate)))
    chains = 2000
    steps = max(1, total // chains)
    draws = _clip(rng.choice(z, size=(steps, chains)), clip_abs_z)

    def rate_at(h: float) -> float:
        s_hi = np.zeros(chains)
        s_lo = np.zeros(chains)
        signals = 0
        for row in draws:
            s_hi = np.maximum(0.0, s_hi + row - k)
            s_lo = np.maximum(0.0, s_lo - row - k)
            hit = (s_hi > h) | (s_lo > h)
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


def budget_thresholds(residuals: np.ndarray, *, interval_s: float, false_alarms: float = 1.0,
                      per_s: float = WEEK_S, shares: dict[str, float] | None = None, cusum_k: float = 0.5,
                      noise_window: int = 24, ewma_lam: float | None = None, alarm_rate_ratio: float = 0.1,
                      values: np.ndarray | None = None, cusum_clip_abs_z: float | None = 3.0,
                      noise_clip_abs_z: float | None = 4.0, confidence: float | None = 0.8,
                      seed: int = 0) -> dict[str, Any]:
    """Limits for a stated false-alarm budget, from the training standardized residuals.

    Parameters
    ----------
    residuals : ndarray
        The training z (``FittedModel.standardized_residuals``).
    interval_s : float
        The feed's nominal reading interval.
    false_alarms, per_s : float
        The budget: this many false alarms per this many seconds (default:
        one per week).
    shares : dict, optional
        Fraction of the budget per rule (default :data:`DEFAULT_SHARES`; an
        ``"ewma"`` share is taken when ``ewma_lam`` is set). Must sum to <= 1.
    cusum_k : float
        CUSUM reference value.
    noise_window : int
        Noise-burst window w.
    ewma_lam : float or None
        Add an EWMA chart with this lambda.
    alarm_rate_ratio : float
        The spike alarm level's rate as a fraction of the warning level's.
    values : ndarray, optional
        The training readings; their quantization step is stored as the
        flatline rule's resolution.
    cusum_clip_abs_z, noise_clip_abs_z : float or None
        Winsorize z at these for the CUSUM and the noise-burst window.
    confidence : float or None
        Confidence of the upper bound on the empirical spike limits (None:
        the point estimate).
    seed : int
        Seed of the bootstrap resamples.

    Returns
    -------
    dict
        JSON-serialisable; see :func:`validate_thresholds` for the layout.
    """
    p = per_point_rate(false_alarms, per_s, interval_s)
    shares = dict(DEFAULT_SHARES if shares is None else shares)
    if ewma_lam is not None and "ewma" not in shares:
        shares["cusum"] = shares.get("cusum", 0.0) / 2.0
        shares["ewma"] = shares["cusum"]
    unknown = set(shares) - {"spike", "cusum", "noise_burst", "flatline", "ewma"}
    if unknown:
        raise RuleError(f"budget shares: unknown rules {sorted(unknown)}")
    if any(not (v > 0) for v in shares.values()) or sum(shares.values()) > 1 + 1e-9:
        raise RuleError(f"budget shares must be > 0 and sum to at most 1, got {shares}")
    if not 0 < alarm_rate_ratio <= 1:
        raise RuleError(f"alarm_rate_ratio must be in (0, 1], got {alarm_rate_ratio!r}")
    z = np.asarray(residuals, dtype=float)
    z = z[np.isfinite(z)]
    abs_z = np.abs(z)

    out: dict[str, Any] = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "mode": "budget",
        "budget": {"false_alarms": float(false_alarms), "per_s": float(per_s), "interval_s": float(interval_s),
                   "per_point_rate": p, "shares": shares, "alarm_rate_ratio": float(alarm_rate_ratio)},
        "training": {"residuals": int(z.size)},
    }
    spike = {}
    for level, rate in (("warning", p * shares.get("spike", 0.0)),
                        ("alarm", p * shares.get("spike", 0.0) * alarm_rate_ratio)):
        gauss = gaussian_abs_limit(rate)
        emp, method = empirical_abs_limit(abs_z, rate, confidence, seed=seed)
        spike[f"gaussian_{level}_abs_z"] = gauss
        spike[f"empirical_{level}_abs_z"] = None if math.isnan(emp) else emp
        spike[f"{level}_abs_z"] = gauss if math.isnan(emp) else max(gauss, emp)
        spike[f"{level}_method"] = method
    spike["alarm_abs_z"] = max(spike["alarm_abs_z"], spike["warning_abs_z"])
    spike["clear_abs_z"] = 0.75 * spike["warning_abs_z"]
    out["spike"] = spike

    screen = spike["alarm_abs_z"]
    calm = z[abs_z < screen]

    p_cusum = p * shares["cusum"]
    h_gauss = cusum_h_for_arl(cusum_k, 1.0 / p_cusum, clip=cusum_clip_abs_z)
    h_emp = empirical_cusum_h(calm, cusum_k, p_cusum, h_gauss, seed=seed, clip_abs_z=cusum_clip_abs_z)
    out["cusum"] = {"k": float(cusum_k), "h": max(h_gauss, h_emp), "clip_abs_z": cusum_clip_abs_z,
                    "gaussian_h": h_gauss, "empirical_h": h_emp}
    if ewma_lam is not None:
        out["ewma"] = {"lam": float(ewma_lam), "limit_sigmas": ewma_limit_for_arl(ewma_lam, 1.0 / (p * shares["ewma"]))}
    else:
        out["ewma"] = None
    p_noise = p * shares["noise_burst"]
    out["noise_burst"] = {"window": int(noise_window), "tail_probability": p_noise, "clip_abs_z": noise_clip_abs_z,
                          "limit_scale": noise_limit_scale(calm, int(noise_window), p_noise, noise_clip_abs_z,
                                                           seed=seed)}
    out["flatline"] = {"run_probability_limit": p * shares["flatline"],
                       "resolution": 0.0 if values is None else estimate_resolution(values)}
    return validate_thresholds(out)


def sigma_thresholds(*, warning_abs_z: float = 4.0, alarm_abs_z: float = 5.0, clear_abs_z: float | None = None,
                     cusum_k: float = 0.5, cusum_h: float = 5.0, noise_window: int = 24,
                     noise_tail_probability: float = 1e-4, flatline_run_probability_limit: float = 1e-6,
                     ewma_lam: float | None = None, ewma_limit_sigmas: float = 3.0,
                     cusum_clip_abs_z: float | None = 3.0, noise_clip_abs_z: float | None = 4.0) -> dict[str, Any]:
    """Fixed limits, in the same layout as :func:`budget_thresholds`."""
    out = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "mode": "sigma",
        "spike": {"warning_abs_z": float(warning_abs_z), "alarm_abs_z": float(alarm_abs_z),
                  "clear_abs_z": float(0.75 * warning_abs_z if clear_abs_z is None else clear_abs_z)},
        "cusum": {"k": float(cusum_k), "h": float(cusum_h), "clip_abs_z": cusum_clip_abs_z},
        "ewma": None if ewma_lam is None else {"lam": float(ewma_lam), "limit_sigmas": float(ewma_limit_sigmas)},
        "noise_burst": {"window": int(noise_window), "tail_probability": float(noise_tail_probability),
                        "clip_abs_z": noise_clip_abs_z, "limit_scale": 1.0},
        "flatline": {"run_probability_limit": float(flatline_run_probability_limit)},
    }
    return validate_thresholds(out)


_REQUIRED = {
    "spike": ("warning_abs_z", "alarm_abs_z", "clear_abs_z"),
    "cusum": ("k", "h"),
    "noise_burst": ("window", "tail_probability", "limit_scale"),
    "flatline": ("run_probability_limit",),
}


def validate_thresholds(data: Any) -> dict[str, Any]:
    """Check a thresholds dict (as stored with a model) and return it.

    Raises
    ------
    RuleError
        Naming the key that is missing or has a bad value.
    """
    if not isinstance(data, dict):
        raise RuleError(f"thresholds must be a dict, got {type(data).__name__}")
    if data.get("format") != FORMAT:
        raise RuleError(f"thresholds: key 'format' must be {FORMAT!r}, got {data.get('format')!r}")
    if data.get("format_version") != FORMAT_VERSION:
        raise RuleError(f"thresholds: format_version {data.get('format_version')!r} is not supported "
                        f"(this build reads {FORMAT_VERSION})")
    if data.get("mode") not in ("sigma", "budget"):
        raise RuleError(f"thresholds: key 'mode' must be 'sigma' or 'budget', got {data.get('mode')!r}")
    for section, keys in _REQUIRED.items():
        block = data.get(section)
        if not isinstance(block, dict):
            raise RuleError(f"thresholds: section {section!r} is missing or not a dict")
        for key in keys:
            value = block.get(key)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                raise RuleError(f"thresholds: key '{section}.{key}' must be a finite number, got {value!r}")
    ewma = data.get("ewma")
    if ewma is not None:
        for key in ("lam", "limit_sigmas"):
            value = ewma.get(key) if isinstance(ewma, dict) else None
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                raise RuleError(f"thresholds: key 'ewma.{key}' must be a finite number, got {value!r}")
    return data
