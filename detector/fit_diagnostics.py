"""What is wrong with a fit, and what to try: each problem found with its likely remedy.

Every estimator hands its standardized residuals here; the result is a
tuple of :class:`FitProblem` (what was seen, and what to do about it) that
lands in ``FittedModel.advice``, and its texts in ``FittedModel.problems``.

Notes
-----
The checks, and the sources of their limits:

* optimiser not converged: statsmodels' own verdict;
* Ljung-Box test (Ljung & Box 1978) of the standardized residuals at
  ``LJUNG_BOX_ALPHA``;
* a daily cycle left in the residuals: the regression F test of z_t on a
  constant and ``DAILY_HARMONICS`` daily sine/cosine pairs (phase from the
  slot's place on the grid), at ``DAILY_ALPHA``. This is the classical test
  for a periodic component of known frequency in a regression (from memory:
  e.g. Brockwell & Davis, Introduction to Time Series and Forecasting, the
  section on testing for hidden periodicities). A single autocorrelation at
  the daily lag misses it: an AR(1) with phi near 1 absorbs a smooth cycle
  into its level, leaving r_96 of 0.07 where the F test gives p < 1e-6;
* an AR root within ``NEAR_UNIT_ROOT`` of the unit circle, or a lag-1
  residual autocorrelation above ``STRONG_LAG1`` (common practice: both say
  the level wanders, which a difference models better);
* the variance ratio mean(z^2), 1 for a model whose variance matches its
  residuals, outside [1/2, 2] (common practice, the same band the engine's
  diagnostics refit uses), and the ratio of the residual variance in the
  second half of the window to the first beyond the two-sided 0.1% points of
  the F distribution.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.stats import f as f_dist

from .spec import ModelSpec

DAY_S = 86400.0
#: Ljung-Box p-value below which the residuals are reported as autocorrelated.
LJUNG_BOX_ALPHA = 0.01
#: Smallest modulus of an AR root reported as near a unit root (common practice).
NEAR_UNIT_ROOT = 1.05
#: Lag-1 residual autocorrelation reported as strong (common practice).
STRONG_LAG1 = 0.3
#: Daily harmonics of the residual test, and its level.
DAILY_HARMONICS = 3
DAILY_ALPHA = 0.001
VARIANCE_RATIO_BAND = (0.5, 2.0)
VARIANCE_SPLIT_ALPHA = 0.001


@dataclass(frozen=True)
class FitProblem:
    """One thing wrong with a fit.

    Attributes
    ----------
    kind : str
        ``"not converged"``, ``"autocorrelated"``, ``"daily cycle"``, ``"unit root"``,
        ``"variance ratio"``, ``"variance change"``, ``"warning"``, ``"constant window"``.
    text : str
        What was seen, with its numbers.
    remedy : str
        The likely remedy, in words.
    """

    kind: str
    text: str
    remedy: str

    def to_dict(self) -> dict[str, str]:
        return {"kind": self.kind, "text": self.text, "remedy": self.remedy}

    def __str__(self) -> str:
        return f"{self.text} (remedy: {self.remedy})"


def autocorrelation(z: np.ndarray, lag: int) -> float:
    """The sample autocorrelation of ``z`` at ``lag`` (NaN when too short)."""
    x = np.asarray(z, dtype=float)
    x = x[np.isfinite(x)]
    if lag < 1 or x.size <= lag + 2:
        return math.nan
    d = x - x.mean()
    denom = float(d @ d)
    return float(d[lag:] @ d[:-lag]) / denom if denom > 0 else math.nan


def daily_cycle_test(z_slots: np.ndarray, interval_s: float) -> tuple[float, float]:
    """(F, p) of the regression of the residuals on daily harmonics (module Notes); (nan, 1) if too short."""
    z = np.asarray(z_slots, dtype=float)
    ok = np.isfinite(z)
    n = int(ok.sum())
    k = 2 * DAILY_HARMONICS
    if n < 2 * DAY_S / interval_s or n <= k + 10:
        return math.nan, 1.0
    angle = 2 * np.pi * (np.arange(z.size)[ok] * interval_s / DAY_S)
    X = np.column_stack([np.ones(n)] + [f(j * angle) for j in range(1, DAILY_HARMONICS + 1)
                                        for f in (np.sin, np.cos)])
    y = z[ok]
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    rss1 = float(np.sum((y - X @ beta) ** 2))
    rss0 = float(np.sum((y - y.mean()) ** 2))
    if not rss1 > 0:
        return math.nan, 1.0
    stat = ((rss0 - rss1) / k) / (rss1 / (n - k - 1))
    return float(stat), float(f_dist.sf(stat, k, n - k - 1))


def smallest_ar_root(spec: ModelSpec, params: dict[str, float]) -> float:
    """The smallest modulus of the roots of phi(z) = 1 - phi_1 z - ... (inf without AR terms)."""
    ar = [params.get(f"ar.L{i}", 0.0) for i in range(1, spec.order[0] + 1)]
    if not any(ar):
        return math.inf
    roots = np.roots(np.r_[1.0, -np.asarray(ar)][::-1])
    return float(np.min(np.abs(roots))) if roots.size else math.inf


def assess(z: np.ndarray, *, spec: ModelSpec, params: dict[str, float], converged: bool, lb_pvalue: float,
           lb_lag: int, interval_s: float | None = None, has_daily_cycle: bool = False,
           warnings_seen: tuple[str, ...] = ()) -> tuple[FitProblem, ...]:
    """Every problem of a fit, each with its remedy (module Notes).

    ``z`` holds one standardized residual per slot after the burn-in, NaN
    for a missing slot, so that the daily test knows each slot's phase.
    """
    z_slots = np.asarray(z, dtype=float)
    z = z_slots[np.isfinite(z_slots)]
    out: list[FitProblem] = []
    if not converged:
        out.append(FitProblem("not converged", "the optimiser did not converge",
                              "the estimates may be off: try a simpler order or a longer training window"))
    if math.isfinite(lb_pvalue) and lb_pvalue < LJUNG_BOX_ALPHA:
        r1 = autocorrelation(z, 1)
        remedy = ("try d = 1 (the level wanders)" if spec.order[1] == 0 and r1 > STRONG_LAG1
                  else "try a higher order (p or q), or 'auto'")
        out.append(FitProblem("autocorrelated",
                              f"residuals are autocorrelated (Ljung-Box p = {lb_pvalue:.3g} at lag {lb_lag}; "
                              f"lag-1 autocorrelation {r1:.2f})", remedy))
    if interval_s and interval_s < DAY_S and not has_daily_cycle:
        stat, p = daily_cycle_test(z_slots, interval_s)
        if p < DAILY_ALPHA:
            out.append(FitProblem("daily cycle",
                                  f"the residuals still follow a daily cycle ({int(round(DAY_S / interval_s))} "
                                  f"slots; F = {stat:.1f}, p = {p:.2g} on {DAILY_HARMONICS} daily harmonics)",
                                  "a daily cycle is not modelled: add calendar terms for '1d' "
                                  "(or fit with 'auto' and the timestamps)"))
    root = smallest_ar_root(spec, params)
    if spec.order[1] == 0 and root < NEAR_UNIT_ROOT:
        out.append(FitProblem("unit root", f"an AR root lies near the unit circle (modulus {root:.3f})",
                              "try d = 1"))
    if z.size >= 20:
        ratio = float(np.mean(z * z))
        low, high = VARIANCE_RATIO_BAND
        if not low <= ratio <= high:
            out.append(FitProblem("variance ratio",
                                  f"the residual variance is {ratio:.2f} times the model's",
                                  "the model's variance does not describe the window: check for outliers "
                                  "or a floor on the variance (quantized readings)"))
        half = z.size // 2
        first, second = z[:half], z[half:]
        v1, v2 = float(np.var(first)), float(np.var(second))
        if v1 > 0 and v2 > 0:
            split = v2 / v1
            lo = f_dist.ppf(VARIANCE_SPLIT_ALPHA / 2, second.size - 1, first.size - 1)
            hi = f_dist.ppf(1 - VARIANCE_SPLIT_ALPHA / 2, second.size - 1, first.size - 1)
            if not lo <= split <= hi:
                out.append(FitProblem("variance change",
                                      f"the residual variance changed within the window (second half / first "
                                      f"half = {split:.2f})",
                                      "the window spans a change of regime: fit on a window after the change"))
    out.extend(FitProblem("warning", f"warning during fit: {w}", "see the warning; the estimates may be off")
               for w in warnings_seen)
    return tuple(out)
