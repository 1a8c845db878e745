"""Alarm limits for one feed: fixed (``sigma`` mode) or from a false-alarm budget (``budget`` mode).

In ``budget`` mode the user states how many false alarms per period a feed
may raise (for example one per week). With the feed's nominal interval this
becomes a rate per reading, shared among the rules; each rule's limit is
then set so that its own false-alarm rate stays within its share, judged by
the *training* standardized residuals, and never below the limit that
normal innovations would need for the same rate. The result is an
:class:`~.limits.AlarmLimits`, stored with the model as its JSON form.

Both functions iterate the rule registry (:mod:`.registry`): each rule's
entry builds its own section and declares its options (:class:`~.contract.LimitKey`);
the keyword arguments of :func:`sigma_thresholds` and the rule-specific ones
of :func:`budget_thresholds` are those options, with their defaults.

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
signal rate is at most p_r. Autocorrelated residuals (a daily shape the
model half misses leaves runs of one sign, which a CUSUM adds up) are
resampled in blocks, by the stationary bootstrap (Politis & Romano 1994)
with the automatic block length of Politis & White (2004); white ones one
by one. h = max(h_G, h_E).

*EWMA* (optional): L solves ARL_0(lambda, L) = 1 / p_r (Gaussian only).

*Noise burst.* Upper tail probability p_r of the successive-difference
statistic; ``limit_scale`` = max(1, Q_E / Q_G) with Q_G its normal-theory
quantile and Q_E the same tail quantile over windows of w winsorized
residuals drawn at random from the training residuals (:mod:`.noise_burst`).

*Flatline.* The run probability limit is p_r itself (see :mod:`.flatline`
for why this bounds the rate); the readings' quantization step and the
feed's repeat habits (:mod:`.repeat_habits`), learnt from the training
readings when given, are stored in its section (``resolution``,
``habits``); :func:`with_training_readings` adds them to sigma-mode limits.
"""

from __future__ import annotations

import inspect
from typing import Any

import numpy as np

from ..errors import RuleError
from .contract import BudgetContext
from .limits import FORMAT, FORMAT_VERSION, AlarmLimits
from . import registry
from .noise_burst import noise_limit_scale  # noqa: F401 (re-exported)
from .tail_limits import (DAY_S, MIN_RESIDUALS, MIN_TAIL_POINTS, WEEK_S, _pareto_pwm,  # noqa: F401 (re-exported)
                          _tail_quantiles, empirical_abs_limit, empirical_cusum_h, gaussian_abs_limit,
                          per_point_rate)


def default_shares() -> dict[str, float]:
    """How the per-reading budget is shared by default: each rule's ``budget_share`` in the registry.

    Common practice here: most to the two rules that see most faults.
    """
    return {entry.name: entry.budget_share for entry in registry.RULES if entry.budget_share is not None}


#: The default shares of the built-in rules.
DEFAULT_SHARES = default_shares()


def _options(mode: str, given: dict[str, Any], function: str) -> dict[str, Any]:
    """The given options over the registry defaults of ``mode``; TypeError for an unknown keyword."""
    keys = {key.name: key for key in registry.limit_keys(mode)}
    for name in given:
        if name not in keys:
            raise TypeError(f"{function}() got an unexpected keyword argument {name!r}")
    return {name: given.get(name, key.default) for name, key in keys.items()}


def budget_thresholds(residuals: np.ndarray, *, interval_s: float, false_alarms: float = 1.0,
                      per_s: float = WEEK_S, shares: dict[str, float] | None = None,
                      values: np.ndarray | None = None, confidence: float | None = 0.8, seed: int = 0,
                      **options: Any) -> AlarmLimits:
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
        Fraction of the budget per rule (default :func:`default_shares`; a
        rule switched on without a share of its own, the EWMA, takes half of
        the share its entry names). Must sum to <= 1.
    values : ndarray, optional
        The training readings; their quantization step is stored as the
        flatline rule's resolution.
    confidence : float or None
        Confidence of the upper bound on the empirical spike limits (None:
        the point estimate).
    seed : int
        Seed of the bootstrap resamples.
    **options
        The rules' budget-mode options (:func:`~.registry.limit_keys`
        ``("budget")``): ``cusum_k`` (CUSUM reference value),
        ``noise_window`` (noise-burst window w), ``ewma_lam`` (add an EWMA
        chart with this lambda), ``alarm_rate_ratio`` (the spike alarm
        level's rate as a fraction of the warning level's),
        ``cusum_clip_abs_z`` and ``noise_clip_abs_z`` (winsorize z at
        these for the CUSUM and the noise-burst window).

    Returns
    -------
    AlarmLimits
    """
    opts = _options("budget", options, "budget_thresholds")
    p = per_point_rate(false_alarms, per_s, interval_s)
    shares = dict(default_shares() if shares is None else shares)
    for entry in registry.RULES:
        if entry.splits_share_of is not None and opts.get(entry.enabled_by) is not None \
                and entry.name not in shares:
            shares[entry.splits_share_of] = shares.get(entry.splits_share_of, 0.0) / 2.0
            shares[entry.name] = shares[entry.splits_share_of]
    unknown = set(shares) - {entry.name for entry in registry.RULES if entry.budget_limits is not None}
    if unknown:
        raise RuleError(f"budget shares: unknown rules {sorted(unknown)}")
    if any(not (v > 0) for v in shares.values()) or sum(shares.values()) > 1 + 1e-9:
        raise RuleError(f"budget shares must be > 0 and sum to at most 1, got {shares}")
    z = np.asarray(residuals, dtype=float)
    z = z[np.isfinite(z)]

    budget = {"false_alarms": float(false_alarms), "per_s": float(per_s), "interval_s": float(interval_s),
              "per_point_rate": p, "shares": shares}
    ctx = BudgetContext(rate=p, shares=shares, z=z, values=values, confidence=confidence, seed=seed,
                        sections={}, budget=budget)
    for entry in registry.RULES:
        if entry.budget_limits is not None:
            ctx.sections[entry.name] = entry.budget_limits(ctx, opts)
    out: dict[str, Any] = {"format": FORMAT, "format_version": FORMAT_VERSION, "mode": "budget",
                           "budget": budget, "training": {"residuals": int(z.size)}, **ctx.sections}
    return AlarmLimits.from_json(out)


def sigma_thresholds(**options: Any) -> AlarmLimits:
    """Fixed limits, in the same layout as :func:`budget_thresholds`.

    The keyword arguments are the rules' sigma-mode options
    (:func:`~.registry.limit_keys` ``("sigma")``), each with its default;
    ``inspect.signature(sigma_thresholds)`` lists them.
    """
    opts = _options("sigma", options, "sigma_thresholds")
    out: dict[str, Any] = {"format": FORMAT, "format_version": FORMAT_VERSION, "mode": "sigma"}
    for entry in registry.RULES:
        if entry.sigma_limits is not None:
            out[entry.name] = entry.sigma_limits(opts)
    return AlarmLimits.from_json(out)


def with_training_readings(limits: AlarmLimits, values: np.ndarray | None) -> AlarmLimits:
    """``limits`` with the flatline section's resolution and repeat habits learnt from ``values``.

    For sigma-mode limits, whose builders see no training readings
    (:func:`budget_thresholds` learns them itself). Returns ``limits``
    unchanged when ``values`` is None or there is no flatline section.
    """
    if values is None or limits.get("flatline") is None:
        return limits
    from .flatline import training_facts

    data = limits.to_json()
    data["flatline"] = {**data["flatline"], **training_facts(values)}
    return AlarmLimits.from_json(data)


def _signature(fixed: list[inspect.Parameter], mode: str, ret: Any) -> inspect.Signature:
    taken = {p.name for p in fixed}
    keys = [inspect.Parameter(key.name, inspect.Parameter.KEYWORD_ONLY, default=key.default)
            for key in registry.limit_keys(mode) if key.name not in taken]
    return inspect.Signature(fixed + keys, return_annotation=ret)


sigma_thresholds.__signature__ = _signature([], "sigma", AlarmLimits)  # type: ignore[attr-defined]
budget_thresholds.__signature__ = _signature(  # type: ignore[attr-defined]
    [p for p in inspect.signature(budget_thresholds).parameters.values() if p.kind != inspect.Parameter.VAR_KEYWORD],
    "budget", AlarmLimits)


def validate_thresholds(data: Any) -> AlarmLimits:
    """Check stored limits (AlarmLimits or its JSON form) and return them as AlarmLimits.

    Raises
    ------
    RuleError
        Naming the key that is missing or has a bad value.
    """
    return AlarmLimits.of(data)


__all__ = ["DAY_S", "DEFAULT_SHARES", "MIN_RESIDUALS", "default_shares", "MIN_TAIL_POINTS", "WEEK_S", "AlarmLimits",
           "budget_thresholds", "empirical_abs_limit", "empirical_cusum_h", "gaussian_abs_limit",
           "noise_limit_scale", "per_point_rate", "sigma_thresholds", "validate_thresholds", "with_training_readings"]
