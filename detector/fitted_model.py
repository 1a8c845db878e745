"""The frozen result of a fit: :class:`FittedModel`, and the residual checks every estimator shares.

Every estimator (:mod:`.sarimax_estimator`, :mod:`.white_noise_estimator`)
returns a :class:`FittedModel`; :mod:`.fitting` is the dispatcher on top.

Notes
-----
The information criteria, with k estimated parameters (sigma2 included)
and n observations used by the likelihood (Hyndman & Khandakar 2008):

.. math::

    AIC = -2\\log L + 2k, \\qquad
    AICc = AIC + \\frac{2k(k+1)}{n-k-1}, \\qquad
    BIC = -2\\log L + k\\log n

The Ljung-Box statistic on m lags of the standardized residuals e_t
(Ljung & Box 1978), tested against chi-square with m - (p + q + P + Q)
degrees of freedom:

.. math::

    Q(m) = n(n+2)\\sum_{j=1}^{m} \\frac{r_j^2}{n-j}

with m = min(10, n/5), or min(2s, n/5) for a seasonal period s (common
practice, Hyndman & Athanasopoulos, Forecasting: Principles and Practice,
section on residual diagnostics).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from statsmodels.stats.diagnostic import acorr_ljungbox

from .errors import DataError
from .spec import ModelSpec
from .statespace import LinearSystem
from .stream import Stream

#: Ljung-Box p-value below which the residuals are reported as autocorrelated.
LJUNG_BOX_ALPHA = 0.01


@dataclass(frozen=True)
class FittedModel:
    """A fitted model: a frozen snapshot of the estimates and diagnostics.

    Attributes
    ----------
    spec : ModelSpec
    params : dict of str to float
        statsmodels' parameter names (``ar.L1``, ``ma.L1``, ``intercept``,
        ``drift``, ``sigma2``, calendar-term names) and estimates.
    sigma2 : float
        The shock variance (not F_t).
    loglik, aic, aicc, bic : float
    nobs : int
        Slots in the fitted window (missing ones included).
    nobs_effective : int
        Non-missing readings used by the likelihood after the burn-in.
    ljung_box_pvalue : float
    ljung_box_lag : int
    converged : bool
        The optimiser's own verdict (``mle_retvals["converged"]``).
    warnings : tuple of str
        Warnings raised during the fit, as ``"Category: message"``.
    problems : tuple of str
        Everything a person should know about this fit's quality.
    standardized_residuals : ndarray
        z_t of the training window, burn-in and missing slots removed.
    system : LinearSystem
    final_state, final_cov : ndarray
        a_n and P_n, the prediction for the first slot after the window.
    selection : Any
        The order search (an ``OrderSelection``) when spec was "auto".
    calendar : Any
        The calendar terms used as regressors, or None.
    origin_epoch_s, interval_s : float or None
        The grid of the fitted window, with calendar terms.
    harmonics_table : tuple of dict
        The AICc of each number of harmonics tried, when K was chosen.
    advice : tuple of FitProblem
        ``problems`` with the likely remedy of each (:mod:`.fit_diagnostics`).
    treatment : str
        How a degenerate window was handled (constant, quantized), or "".
    """

    spec: ModelSpec
    params: dict[str, float]
    sigma2: float
    loglik: float
    aic: float
    aicc: float
    bic: float
    nobs: int
    nobs_effective: int
    ljung_box_pvalue: float
    ljung_box_lag: int
    converged: bool
    warnings: tuple[str, ...]
    problems: tuple[str, ...]
    standardized_residuals: np.ndarray = field(repr=False)
    system: LinearSystem = field(repr=False)
    final_state: np.ndarray = field(repr=False)
    final_cov: np.ndarray = field(repr=False)
    selection: Any = None
    calendar: Any = None
    origin_epoch_s: float | None = None
    interval_s: float | None = None
    harmonics_table: tuple = ()
    advice: tuple = ()
    treatment: str = ""

    @property
    def is_poor(self) -> bool:
        return bool(self.problems)

    @property
    def description(self) -> str:
        """The chosen form in words, e.g. ``"daily cycle, 3 harmonics; AR(1) + const"``."""
        if self.calendar is None:
            return self.spec.label
        return f"{self.calendar.description}; {self.spec.label}"

    def stream(self, *, level: float = 0.95, model_version: int | None = None) -> Stream:
        """A :class:`Stream` positioned right after the last fitted slot."""
        regression = None
        if self.calendar is not None:
            regression = self.calendar.regression(self.params, self.origin_epoch_s, self.interval_s)
        return Stream(
            self.system,
            self.final_state,
            self.final_cov,
            self.nobs,
            level=level,
            model_version=model_version,
            regression=regression,
            meta={"spec": self.spec.to_dict(), "label": self.spec.label, "params": self.params},
        )

    def summary(self) -> dict[str, Any]:
        """A JSON-serialisable record of the fit, for the store and the CLI."""
        out = {
            "model": self.spec.label,
            "spec": self.spec.to_dict(),
            "params": self.params,
            "sigma2": self.sigma2,
            "loglik": self.loglik,
            "aic": self.aic,
            "aicc": self.aicc,
            "bic": self.bic,
            "nobs": self.nobs,
            "nobs_effective": self.nobs_effective,
            "ljung_box_pvalue": self.ljung_box_pvalue,
            "ljung_box_lag": self.ljung_box_lag,
            "converged": self.converged,
            "warnings": list(self.warnings),
            "problems": list(self.problems),
            "description": self.description,
        }
        if self.advice:
            out["advice"] = [p.to_dict() for p in self.advice]
        if self.treatment:
            out["treatment"] = self.treatment
        if self.selection is not None:
            out["selection"] = self.selection.to_dict()
        if self.calendar is not None:
            out["calendar"] = self.calendar.to_dict()
            out["calendar_terms"] = dict(zip(self.calendar.names,
                                             (self.params[f"x{i + 1}"] for i in range(len(self.calendar.names)))))
        if self.harmonics_table:
            out["harmonics_table"] = list(self.harmonics_table)
        return out


def as_series(values: Any) -> np.ndarray:
    """Validate ``values`` as a 1-D float array on a regular grid (NaN = missing)."""
    try:
        array = np.asarray(values, dtype=float)
    except (TypeError, ValueError) as exc:
        raise DataError(f"values must be numbers (NaN for a missing slot): {exc}") from exc
    if array.ndim != 1:
        raise DataError(f"values must be 1-D, got shape {array.shape}")
    if np.isinf(array).any():
        raise DataError(f"values contain inf at positions {np.flatnonzero(np.isinf(array))[:5].tolist()}")
    return array


def ljung_box(residuals: np.ndarray, lag: int, model_df: int) -> float:
    """Ljung-Box p-value of ``residuals`` at ``lag``, with ``model_df`` fitted ARMA terms."""
    x = residuals[np.isfinite(residuals)]
    if lag <= model_df or x.size <= lag + 1 or not np.ptp(x) > 0:
        return math.nan
    table = acorr_ljungbox(x, lags=[lag], model_df=model_df)
    return float(table["lb_pvalue"].iloc[0])


def ljung_box_lag(n: int, seasonal_period: int | None) -> int:
    base = 2 * seasonal_period if seasonal_period else 10
    return max(1, min(base, n // 5))
