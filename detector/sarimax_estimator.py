"""The SARIMAX estimator: maximum likelihood with statsmodels, then the model's state-space form.

One estimator per module, as statsmodels arranges its own; :mod:`.fitting`
chooses between them. See :mod:`.fitted_model` for the criteria and the
residual checks.
"""

from __future__ import annotations

import math
import warnings
from typing import Any

import numpy as np
from statsmodels.tsa.statespace.sarimax import SARIMAX

from .errors import FitError
from .fitted_model import LJUNG_BOX_ALPHA, FittedModel, ljung_box, ljung_box_lag
from .spec import ModelSpec
from .statespace import system_from_results

MAX_ITERATIONS = 200


def fit_sarimax(values: np.ndarray, spec: ModelSpec, exog: np.ndarray | None = None):
    """Run the statsmodels fit; return (results, captured warning texts).

    The filter runs with ``tolerance=0``: statsmodels otherwise freezes P_t
    once its change falls below 1e-19 in its own measure, which in an
    ARIMA(1,2,1) happened at step 15 while the forecasts still moved by 1e-9.
    The stream starts from the final P_t, so it must be the fully recursed one.
    """
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


def estimate_sarimax(y: np.ndarray, spec: ModelSpec, *, calendar: Any = None, timestamps_epoch_s: Any = None,
             selection: Any = None) -> FittedModel:
    """Fit one given spec with statsmodels SARIMAX (see :func:`.fitting.fit`)."""
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
    lag = ljung_box_lag(z.size, seasonal_period)
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
