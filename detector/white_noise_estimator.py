"""The closed-form estimator of white noise with a constant: the fallback that always exists.

Notes
-----
For y_t = mu + e_t, e_t ~ N(0, sigma^2) iid, on the n observed slots, the
maximum likelihood estimates and the maximised log-likelihood are
(e.g. Hamilton, Time Series Analysis, 1994, section 5.1)

.. math::

    \\hat\\mu = \\bar y, \\qquad \\hat\\sigma^2 = \\frac{1}{n}\\sum (y_t - \\bar y)^2, \\qquad
    \\log L = -\\frac{n}{2}\\big(\\log 2\\pi\\sigma^2\\big) - \\frac{1}{2\\sigma^2}\\sum (y_t - \\mu)^2

The last form is used when sigma^2 is raised to a floor (see
:mod:`.estimation`). The state-space form is statsmodels' SARIMAX for
order (0, 0, 0) with a constant: one state, T = 0, c = mu, R Q R' = sigma^2,
so a_{t+1} = mu and P_{t+1} = sigma^2 after every slot.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .errors import FitError
from .fit_diagnostics import FitProblem, assess
from .fitted_model import FittedModel, ljung_box, ljung_box_lag
from .spec import ModelSpec
from .statespace import LinearSystem

WHITE_NOISE = ModelSpec.white_noise()


def estimate_white_noise(y: np.ndarray, *, selection: Any = None, interval_s: float | None = None,
                         sigma2_floor: float = 0.0, treatment: str = "",
                         extra_problems: tuple[FitProblem, ...] = ()) -> FittedModel:
    """White noise with a constant, in closed form (module Notes)."""
    x = y[np.isfinite(y)]
    n = int(x.size)
    if n < 2:
        raise FitError(f"{WHITE_NOISE.label} needs at least 2 non-missing readings to fit, got {n}")
    mu = float(np.mean(x))
    ss = float(np.sum((x - mu) ** 2))
    sigma2 = max(ss / n, float(sigma2_floor))
    if not sigma2 > 0:
        raise FitError("the window has zero variance and no floor was given")
    loglik = -0.5 * n * math.log(2 * math.pi * sigma2) - ss / (2 * sigma2)
    # The criteria count every slot of the window, as statsmodels' nobs_effective does, so that
    # this candidate's AICc compares with the SARIMAX candidates' on the same window.
    k, n_ic = 2, int(y.size)
    aic = -2 * loglik + 2 * k
    aicc = aic + 2 * k * (k + 1) / (n_ic - k - 1) if n_ic - k - 1 > 0 else math.inf
    bic = -2 * loglik + k * math.log(n_ic)
    z = (x - mu) / math.sqrt(sigma2)
    lag = ljung_box_lag(z.size, None)
    lb_p = ljung_box(z, lag, 0)
    params = {"intercept": mu, "sigma2": sigma2}
    z_slots = (y - mu) / math.sqrt(sigma2)
    # A constant window (extra_problems) has nothing more to test: every residual is 0.
    advice = extra_problems or assess(z_slots, spec=WHITE_NOISE, params=params, converged=True,
                                      lb_pvalue=lb_p, lb_lag=lag, interval_s=interval_s)
    system = LinearSystem(design=np.ones(1), obs_intercept=0.0, obs_cov=0.0, transition=np.zeros((1, 1)),
                          state_intercept_const=np.array([mu]), state_intercept_slope=np.zeros(1),
                          state_cov=np.array([[sigma2]]))
    return FittedModel(
        spec=WHITE_NOISE, params=params, sigma2=sigma2, loglik=loglik, aic=aic, aicc=aicc, bic=bic,
        nobs=int(y.size), nobs_effective=n_ic, ljung_box_pvalue=lb_p, ljung_box_lag=lag, converged=True,
        warnings=(), problems=tuple(p.text for p in advice), standardized_residuals=z, system=system,
        final_state=np.array([mu]), final_cov=np.array([[sigma2]]), selection=selection,
        interval_s=interval_s, advice=advice, treatment=treatment,
    )
