"""Fit a feed's ARIMA model with statsmodels SARIMAX, and report how well it fits.

``fit(values, spec)`` returns a frozen :class:`FittedModel` snapshot; its
:meth:`~FittedModel.stream` continues the model one reading at a time.
``fit(values, "auto")`` chooses the orders first (:mod:`.order_selection`).

A poor fit is reported, never hidden: optimiser failure, warnings raised
during the fit (captured, not printed), and a Ljung-Box rejection of the
standardized residuals all land in :attr:`FittedModel.problems`.

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
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .errors import DataError, FitError
from .spec import ModelSpec
from .statespace import LinearSystem, system_from_results
from .stream import Stream

#: Ljung-Box p-value below which the residuals are reported as autocorrelated.
LJUNG_BOX_ALPHA = 0.01
MAX_ITERATIONS = 200


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

    @property
    def is_poor(self) -> bool:
        return bool(self.problems)

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
        }
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
    from statsmodels.stats.diagnostic import acorr_ljungbox

    x = residuals[np.isfinite(residuals)]
    if lag <= model_df or x.size <= lag + 1:
        return math.nan
    table = acorr_ljungbox(x, lags=[lag], model_df=model_df)
    return float(table["lb_pvalue"].iloc[0])


def _ljung_box_lag(n: int, seasonal_period: int | None) -> int:
    base = 2 * seasonal_period if seasonal_period else 10
    return max(1, min(base, n // 5))


def fit_sarimax(values: np.ndarray, spec: ModelSpec, exog: np.ndarray | None = None):
    """Run the statsmodels fit; return (results, captured warning texts).

    The filter runs with ``tolerance=0``: statsmodels otherwise freezes P_t
    once its change falls below 1e-19 in its own measure, which in an
    ARIMA(1,2,1) happened at step 15 while the forecasts still moved by 1e-9.
    The stream starts from the final P_t, so it must be the fully recursed one.
    """
    from statsmodels.tsa.statespace.sarimax import SARIMAX

    captured: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            model = SARIMAX(
                values,
                exog=exog,
                order=spec.order,
                seasonal_order=spec.seasonal_order,
                trend=spec.trend,
                enforce_stationarity=True,
                enforce_invertibility=True,
                tolerance=0.0,
            )
            results = model.fit(disp=False, maxiter=MAX_ITERATIONS)
        except (ValueError, np.linalg.LinAlgError) as exc:
            raise FitError(f"statsmodels could not fit {spec.label}: {exc}") from exc
    for w in caught:
        text = f"{w.category.__name__}: {w.message}"
        if text not in captured:
            captured.append(text)
    return results, captured


def fit(values: Any, spec: ModelSpec | str, *, calendar: Any = None, timestamps_epoch_s: Any = None,
        seasonal_period: int | None = None) -> FittedModel:
    """Fit ``spec`` (or choose one with ``"auto"``) to ``values``.

    Parameters
    ----------
    values : array_like, 1-D
        Readings on a regular grid, NaN for missing slots.
    spec : ModelSpec or "auto"
        The model, or "auto" for order selection by AICc.
    calendar : CalendarTerms, optional
        Calendar regressors (seasonality by Fourier terms, day flags).
    timestamps_epoch_s : array_like, optional
        Epoch seconds of the slots; required with ``calendar``. When a
        period's number of harmonics is not given, it is chosen by AICc
        and the table is kept in ``harmonics_table``.
    seasonal_period : int, optional
        With "auto": a short period s (<= 24 slots) for which seasonal
        differencing is also tried.

    Returns
    -------
    FittedModel

    Raises
    ------
    FitError
        Too few readings, or statsmodels failed outright.
    """
    y = as_series(values)
    if isinstance(spec, str):
        if spec != "auto":
            raise FitError(f"spec must be a ModelSpec or 'auto', got {spec!r}")
        from .order_selection import select_order

        return select_order(y, calendar=calendar, timestamps_epoch_s=timestamps_epoch_s,
                            seasonal_period=seasonal_period)
    if calendar is not None and not calendar.is_resolved:
        from dataclasses import replace

        from .seasonality import choose_harmonics

        epoch = np.asarray(timestamps_epoch_s, dtype=float)
        calendar, table = choose_harmonics(y, epoch, spec, calendar)
        fitted = fit_spec(y, spec, calendar=calendar, timestamps_epoch_s=epoch)
        return replace(fitted, harmonics_table=tuple(table))
    return fit_spec(y, spec, calendar=calendar, timestamps_epoch_s=timestamps_epoch_s)


def fit_spec(y: np.ndarray, spec: ModelSpec, *, calendar: Any = None, timestamps_epoch_s: Any = None,
             selection: Any = None) -> FittedModel:
    """Fit one given spec; see :func:`fit`."""
    observed = int(np.isfinite(y).sum())
    k_params = spec.order[0] + spec.order[2] + len(spec.trend.replace("n", "")) + 1
    if spec.seasonal:
        k_params += spec.seasonal[0] + spec.seasonal[2]
    exog = None
    origin = interval = None
    if calendar is not None:
        if timestamps_epoch_s is None:
            raise FitError("calendar terms need the slots' timestamps")
        epoch = np.asarray(timestamps_epoch_s, dtype=float)
        if epoch.shape != y.shape:
            raise FitError(f"timestamps shape {epoch.shape} does not match values shape {y.shape}")
        exog = calendar.design(epoch)
        k_params += exog.shape[1]
        origin = float(epoch[0])
        interval = float(epoch[1] - epoch[0]) if epoch.size > 1 else None
    minimum = max(10, 3 * k_params)
    if observed < minimum:
        raise FitError(f"{spec.label} needs at least {minimum} non-missing readings to fit, got {observed}")

    results, captured = fit_sarimax(y, spec, exog)
    model = results.model
    burn = int(max(model.loglikelihood_burn, getattr(results, "nobs_diffuse", 0)))
    z = np.asarray(results.standardized_forecasts_error[0, burn:], dtype=float)
    z = z[np.isfinite(z)]
    seasonal_period = spec.seasonal[3] if spec.seasonal else None
    if calendar is not None and seasonal_period is None:
        seasonal_period = calendar.shortest_period_steps(interval)
    lag = _ljung_box_lag(z.size, seasonal_period)
    model_df = spec.order[0] + spec.order[2] + (spec.seasonal[0] + spec.seasonal[2] if spec.seasonal else 0)
    lb_p = ljung_box(z, lag, model_df)
    converged = bool(results.mle_retvals.get("converged", False)) if results.mle_retvals else False

    problems = []
    if not converged:
        problems.append("the optimiser did not converge")
    if math.isfinite(lb_p) and lb_p < LJUNG_BOX_ALPHA:
        problems.append(f"residuals are autocorrelated (Ljung-Box p = {lb_p:.3g} at lag {lag})")
    problems.extend(f"warning during fit: {w}" for w in captured)

    names = list(model.param_names)
    params = {name: float(v) for name, v in zip(names, np.asarray(results.params, dtype=float))}
    n_eff = int(results.nobs_effective) if hasattr(results, "nobs_effective") else observed
    return FittedModel(
        spec=spec,
        params=params,
        sigma2=params.get("sigma2", math.nan),
        loglik=float(results.llf),
        aic=float(results.aic),
        aicc=float(results.aicc),
        bic=float(results.bic),
        nobs=int(y.size),
        nobs_effective=n_eff,
        ljung_box_pvalue=lb_p,
        ljung_box_lag=lag,
        converged=converged,
        warnings=tuple(captured),
        problems=tuple(problems),
        standardized_residuals=z,
        system=system_from_results(results),
        final_state=np.array(results.filter_results.predicted_state[:, -1]),
        final_cov=np.array(results.filter_results.predicted_state_cov[:, :, -1]),
        selection=selection,
        calendar=calendar,
        origin_epoch_s=origin,
        interval_s=interval,
    )
