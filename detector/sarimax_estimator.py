"""The SARIMAX estimator: maximum likelihood with statsmodels on centred, scaled values.

One estimator per module, as statsmodels arranges its own; :mod:`.fitting`
chooses between them. See :mod:`.fitted_model` for the criteria and
:mod:`.fit_diagnostics` for the residual checks.

Notes
-----
A feed's units must not decide whether the optimiser converges (a
vibration RMS of 0.0268 +- 3e-4 and a meter at 1e6 +- 10 are the same
problem). The fit runs on u_t = (y_t - m) / s and the estimates are mapped
back to y_t = m + s u_t:

.. math::

    \\beta_y = s\\,\\beta_u, \\quad \\sigma^2_y = s^2 \\sigma^2_u, \\quad
    \\text{drift}_y = s\\,\\text{drift}_u, \\quad
    c_y = s\\,c_u + \\phi(1)\\Phi(1)\\,m \\ (d + D = 0), \\quad c_y = s\\,c_u \\ (d + D \\ge 1)

(phi and Phi the AR and seasonal AR polynomials; AR and MA coefficients
do not change). The centre m is used only where a constant can absorb it
(d + D = 0 with a constant) or differencing removes it (d + D >= 1; the
differencing states start exactly diffuse, so the level drops out).
statsmodels then runs its filter once on the original values with the
mapped parameters: the states, covariances, standardized residuals and
the log-likelihood come out on the feed's own scale, the last equal to the
scaled one less the Jacobian term n log s.
"""

from __future__ import annotations

import math
import warnings
from typing import Any

import numpy as np
from statsmodels.tsa.statespace.sarimax import SARIMAX

from .errors import FitError
from .fit_diagnostics import assess
from .fitted_model import FittedModel, ljung_box, ljung_box_lag
from .spec import ModelSpec
from .statespace import system_from_results

MAX_ITERATIONS = 200


def _model(values: np.ndarray, spec: ModelSpec, exog: np.ndarray | None) -> SARIMAX:
    return SARIMAX(values, exog=exog, order=spec.order, seasonal_order=spec.seasonal_order, trend=spec.trend,
                   enforce_stationarity=True, enforce_invertibility=True, tolerance=0.0)


def _captured(caught) -> list[str]:
    out: list[str] = []
    for w in caught:
        text = f"{w.category.__name__}: {w.message}"
        if text not in out:
            out.append(text)
    return out


def fit_sarimax(values: np.ndarray, spec: ModelSpec, exog: np.ndarray | None = None):
    """Run the statsmodels fit on ``values`` as given; return (results, captured warning texts).

    The filter runs with ``tolerance=0``: statsmodels otherwise freezes P_t
    once its change falls below 1e-19 in its own measure, which in an
    ARIMA(1,2,1) happened at step 15 while the forecasts still moved by 1e-9.
    The stream starts from the final P_t, so it must be the fully recursed one.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            results = _model(values, spec, exog).fit(disp=False, maxiter=MAX_ITERATIONS)
        except (ValueError, np.linalg.LinAlgError) as exc:
            raise FitError(f"statsmodels could not fit {spec.label}: {exc}") from exc
    return results, _captured(caught)


def centre_and_scale(y: np.ndarray, spec: ModelSpec) -> tuple[float, float]:
    """The centre m and scale s of the fit (module Notes); s is the spread of y differenced d times."""
    x = y[np.isfinite(y)]
    differenced = spec.order[1] + (spec.seasonal[1] if spec.seasonal else 0)
    centre = float(np.mean(x)) if x.size and (differenced or "c" in spec.trend) else 0.0
    scale = math.nan
    if spec.order[1]:
        steps = np.diff(y, n=spec.order[1])
        steps = steps[np.isfinite(steps)]
        if steps.size > 1:
            scale = float(np.std(steps))
    if not (math.isfinite(scale) and scale > 0):
        scale = float(np.std(x - centre)) if centre else float(np.sqrt(np.mean(x * x))) if x.size else 1.0
    if not (math.isfinite(scale) and scale > 0):
        scale = 1.0
    return centre, scale


def map_back(params: dict[str, float], spec: ModelSpec, centre: float, scale: float) -> dict[str, float]:
    """Estimates on u = (y - m) / s as estimates on y (module Notes)."""
    params = {name: float(value) for name, value in params.items()}
    out = dict(params)
    for name, value in params.items():
        if name == "sigma2":
            out[name] = value * scale * scale
        elif name == "drift" or name.startswith("x"):
            out[name] = value * scale
    if "intercept" in params:
        out["intercept"] = params["intercept"] * scale
        if spec.order[1] + (spec.seasonal[1] if spec.seasonal else 0) == 0:
            phi = 1.0 - sum(v for k, v in params.items() if k.startswith("ar.L"))
            big_phi = 1.0 - sum(v for k, v in params.items() if k.startswith("ar.S.L"))
            out["intercept"] += phi * big_phi * centre
    return out


def estimate_sarimax(y: np.ndarray, spec: ModelSpec, *, calendar: Any = None, timestamps_epoch_s: Any = None,
                     selection: Any = None, interval_s: float | None = None,
                     sigma2_floor: float = 0.0, treatment: str = "") -> FittedModel:
    """Fit one given spec with statsmodels SARIMAX (see :func:`.fitting.fit`).

    ``sigma2_floor`` raises the fitted shock variance to at least that
    value (for quantized readings, see :mod:`.estimation`); the filter then
    runs with the raised value.
    """
    observed = int(np.isfinite(y).sum())
    k_params = spec.order[0] + spec.order[2] + len(spec.trend.replace("n", "")) + 1
    if spec.seasonal:
        k_params += spec.seasonal[0] + spec.seasonal[2]
    exog = None
    origin = None
    interval = interval_s
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

    centre, scale = centre_and_scale(y, spec)
    scaled, captured = fit_sarimax((y - centre) / scale, spec, exog)
    converged = bool(scaled.mle_retvals.get("converged", False)) if scaled.mle_retvals else False
    model = _model(y, spec, exog)
    names = list(model.param_names)
    mapped = map_back(dict(zip(names, np.asarray(scaled.params, dtype=float))), spec, centre, scale)
    if "sigma2" in mapped and mapped["sigma2"] < sigma2_floor:
        mapped["sigma2"] = sigma2_floor
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            results = model.filter(np.array([mapped[name] for name in names]))
        except (ValueError, np.linalg.LinAlgError) as exc:
            raise FitError(f"statsmodels could not filter {spec.label} on the feed's scale: {exc}") from exc
    captured += [w for w in _captured(caught) if w not in captured]

    burn = int(max(model.loglikelihood_burn, getattr(results, "nobs_diffuse", 0)))
    z_slots = np.asarray(results.standardized_forecasts_error[0, burn:], dtype=float)
    z_slots = np.where(np.isfinite(y[burn:]), z_slots, np.nan)  # statsmodels writes 0 for a missing slot
    z = z_slots[np.isfinite(z_slots)]
    seasonal_period = spec.seasonal[3] if spec.seasonal else None
    if calendar is not None and seasonal_period is None:
        seasonal_period = calendar.shortest_period_steps(interval)
    lag = ljung_box_lag(z.size, seasonal_period)
    model_df = spec.order[0] + spec.order[2] + (spec.seasonal[0] + spec.seasonal[2] if spec.seasonal else 0)
    lb_p = ljung_box(z, lag, model_df)
    advice = assess(z_slots, spec=spec, params=mapped, converged=converged, lb_pvalue=lb_p, lb_lag=lag,
                    interval_s=interval, has_daily_cycle=calendar is not None and calendar.has_period(86400.0),
                    warnings_seen=tuple(captured))
    n_eff = int(results.nobs_effective) if hasattr(results, "nobs_effective") else observed
    return FittedModel(
        spec=spec,
        params=mapped,
        sigma2=mapped.get("sigma2", math.nan),
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
        problems=tuple(p.text for p in advice),
        standardized_residuals=z,
        system=system_from_results(results),
        final_state=np.array(results.filter_results.predicted_state[:, -1]),
        final_cov=np.array(results.filter_results.predicted_state_cov[:, :, -1]),
        selection=selection,
        calendar=calendar,
        origin_epoch_s=origin,
        interval_s=interval,
        advice=advice,
        treatment=treatment,
    )
