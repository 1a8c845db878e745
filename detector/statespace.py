"""The linear Gaussian state-space form of a fitted model, as plain arrays.

This module only holds system matrices; filtering is in :mod:`.stream` and
:mod:`.bank`. The names follow statsmodels' ``Representation`` (and
Durbin & Koopman 2012, section 4.1):

.. math::

    y_t = Z a_t + d_t + \\varepsilon_t, \\qquad \\varepsilon_t \\sim N(0, H)

    a_{t+1} = T a_t + c_t + R \\eta_t, \\qquad \\eta_t \\sim N(0, Q)

============  ==================  ==========================================  =========
symbol        name in code        meaning                                     shape
============  ==================  ==========================================  =========
Z             ``design``          maps the state to the reading               (k,)
d_t           ``obs_intercept``   constant part of the reading's mean         scalar
H             ``obs_cov``         measurement noise variance (0 for ARIMA)    scalar
T             ``transition``      state transition                            (k, k)
c_t           ``state_intercept`` c0 + c1 * t: the trend, on the state        (k,), (k,)
R Q R'        ``state_cov``       covariance of the state disturbance         (k, k)
a_t, P_t      ``state``, ``cov``  predicted state mean and covariance          (k,), (k, k)
============  ==================  ==========================================  =========

Notes
-----
statsmodels' SARIMAX puts the trend A(t) into the state intercept of the
first ARMA state (after the differencing states), with
A(t) = intercept + drift * (t + 1) for the 0-based step t (``trend_offset``
is 1). So c_t is affine in the step and is held as ``c0 + c1 * t`` exactly.
Calendar regression terms, when present, enter d_t and are added by the
stream from the reading's timestamp.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import FitError


@dataclass(frozen=True)
class LinearSystem:
    """Time-invariant system matrices plus an affine state intercept."""

    design: np.ndarray
    obs_intercept: float
    obs_cov: float
    transition: np.ndarray
    state_intercept_const: np.ndarray
    state_intercept_slope: np.ndarray
    state_cov: np.ndarray

    @property
    def k_states(self) -> int:
        return int(self.design.shape[0])

    def state_intercept(self, step: int) -> np.ndarray:
        """c_t for the 0-based step t of the model's grid."""
        return self.state_intercept_const + self.state_intercept_slope * step

    def to_arrays(self) -> dict[str, np.ndarray]:
        return {
            "design": self.design,
            "obs_intercept": np.array([self.obs_intercept]),
            "obs_cov": np.array([self.obs_cov]),
            "transition": self.transition,
            "state_intercept_const": self.state_intercept_const,
            "state_intercept_slope": self.state_intercept_slope,
            "state_cov": self.state_cov,
        }

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> "LinearSystem":
        return cls(
            design=np.asarray(arrays["design"], dtype=float),
            obs_intercept=float(arrays["obs_intercept"][0]),
            obs_cov=float(arrays["obs_cov"][0]),
            transition=np.asarray(arrays["transition"], dtype=float),
            state_intercept_const=np.asarray(arrays["state_intercept_const"], dtype=float),
            state_intercept_slope=np.asarray(arrays["state_intercept_slope"], dtype=float),
            state_cov=np.asarray(arrays["state_cov"], dtype=float),
        )


def _fixed(matrix: np.ndarray, name: str) -> np.ndarray:
    """The one time-invariant slice of a statsmodels system matrix."""
    if matrix.shape[-1] != 1:
        raise FitError(f"system matrix {name} varies in time; leadline needs it fixed")
    return np.array(matrix[..., 0], dtype=float)


def system_from_results(results) -> LinearSystem:
    """Read the system matrices of fitted SARIMAX ``results``.

    Parameters
    ----------
    results : statsmodels SARIMAXResults
        A fit (or a ``filter``) of a SARIMAX model with ``mle_regression``
        left on, so that any exog enters the observation intercept.

    Returns
    -------
    LinearSystem
        With the exog part of d_t left out: the stream adds x_t' beta.
    """
    fr = results.filter_results
    model = results.model
    design = _fixed(fr.design, "design")[0]
    transition = _fixed(fr.transition, "transition")
    selection = _fixed(fr.selection, "selection")
    state_cov = selection @ _fixed(fr.state_cov, "state_cov") @ selection.T
    obs_cov = float(_fixed(fr.obs_cov, "obs_cov")[0, 0])

    k_states = design.shape[0]
    const = np.zeros(k_states)
    slope = np.zeros(k_states)
    if model.k_trend > 0:
        params = dict(zip(model.param_names, np.asarray(results.params, dtype=float)))
        # SARIMAX places the trend on the first ARMA state, after the
        # k_states_diff differencing states (simple_differencing is off).
        row = int(model._k_states_diff)
        offset = float(model.trend_offset)
        intercept = params.get("intercept", 0.0)
        drift = params.get("drift", 0.0)
        const[row] = intercept + drift * offset
        slope[row] = drift
        in_sample = np.asarray(fr.state_intercept)
        check = const[:, None] + slope[:, None] * np.arange(min(3, in_sample.shape[1]))
        if not np.allclose(in_sample[:, : check.shape[1]], check, rtol=1e-12, atol=1e-12):
            raise FitError("the fitted trend does not match the affine state intercept leadline expects")
    return LinearSystem(
        design=design,
        obs_intercept=0.0,
        obs_cov=obs_cov,
        transition=transition,
        state_intercept_const=const,
        state_intercept_slope=slope,
        state_cov=state_cov,
    )
