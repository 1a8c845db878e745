"""Accumulated departure from a frozen anchor: a drift statistic for integrated models.

An ARIMA with d >= 1 follows a slow ramp: every reading moves the level
estimate part of the way, so the one-step innovations of a ramp settle at a
small constant (for ARIMA(0,1,1) a ramp of delta per step gives innovations
of about delta / (1 + theta)) and the one-step z barely moves. Measured from a
frozen anchor instead, the ramp's forecast errors grow linearly with the
horizon while their standard deviation grows only like its square root.

:class:`HorizonDrift` freezes the stream's predicted state at an anchor slot
and, for the next readings h = 1..H, scores the h-step forecast error and
the mean of the h-step errors so far, each standardized by its exact
variance under the model. It re-anchors every H slots (or on demand) from
the state the caller passes in. It only computes the statistic; it raises
no alarm and is not part of the monitor yet.

Notes
-----
State-space form as in :mod:`leadline.detector.statespace` (Durbin & Koopman
2012, *Time Series Analysis by State Space Methods*, 2nd ed., sections 4.1
and 4.11 on forecasting): y_t = Z alpha_t + d_t + eps_t, eps_t ~ N(0, H);
alpha_{t+1} = T alpha_t + c_t + R eta_t, eta_t ~ N(0, Q).

Anchor at slot s with the predicted state a_s = E[alpha_s | Y_{s-1}] and
P_s = Var(alpha_s | Y_{s-1}) (what the stream holds before reading s). For
h = 1, 2, ... the slot s + h - 1 is forecast from Y_{s-1}:

.. math::

    a^{(1)} = a_s, \\quad a^{(h+1)} = T a^{(h)} + c_{s+h-1}, \\qquad
    P^{(1)} = P_s, \\quad P^{(h+1)} = T P^{(h)} T' + R Q R'

    f_h = Z a^{(h)} + d_{s+h-1}, \\qquad
    F_h = \\mathrm{Var}(e_h) = Z P^{(h)} Z' + H, \\qquad e_h = y_{s+h-1} - f_h

so f_h = Z T^{h-1} a_s (+ the intercepts), the h-step forecast of
statsmodels' ``get_forecast``. With x_h = alpha_{s+h-1} - a^{(h)} the state
error, x_{h+1} = T x_h + R eta, and eta is independent of x_i for i <= h, so
for i <= j

.. math::

    \\mathrm{Cov}(x_j, x_i) = T^{j-i} P^{(i)}, \\qquad
    C_{ij} = \\mathrm{Cov}(e_i, e_j) = Z T^{j-i} P^{(i)} Z' + H [i = j].

The accumulated statistic after m readings is the mean error over its exact
standard deviation (the 1/m cancels):

.. math::

    A_m = \\frac{\\sum_{h=1}^{m} e_h}{\\sqrt{S_m}}, \\qquad
    S_m = \\sum_{i,j \\le m} C_{ij} = S_{m-1} + F_m + 2 Z w_m,

    w_m = \\sum_{i<m} T^{m-i} P^{(i)} Z', \\qquad w_1 = 0, \\quad
    w_{m+1} = T (w_m + P^{(m)} Z'),

O(k^2) per reading. Under the model (e_1, ..., e_m) is Gaussian with mean
zero given Y_{s-1}, so z_h = e_h / sqrt(F_h) and A_m are N(0, 1) for each m;
they are not independent across m (A_m is a running sum).

The caller's one-step forecast f^1_t = Z a_t + d_t (same t) gives e_h
without d_t: e_h = y_t - f^1_t + Z (a_t - a^{(h)}), so calendar terms and
level offsets, which enter d_t, need not be known here. c_t (the trend) is
taken from the :class:`~leadline.detector.statespace.LinearSystem`.

Limits. A_m is evaluated at every slot and the A_m of one anchor window
are nested sums, strongly correlated, so a per-slot tail probability does
not give the false-alarm rate. :func:`calibrate_limit` finds the limit by
simulation from the model itself (seeded): the fraction of anchor windows
whose max_m |A_m| exceeds the limit, divided by H, is the rate of alarms
per slot. Measured with it (100,000 windows, two seeds agreeing within
0.04): the limits hardly depend on the model, and lie well below the
Bonferroni value z_{1 - r/2} of a per-slot test:

==========================  ===========  ===========  ===========  ===========
budget r (alarms per slot)  H = 24       H = 48       H = 96       z_{1 - r/2}
==========================  ===========  ===========  ===========  ===========
1 per week, 1-min slots     3.43 - 3.49  3.28 - 3.31  3.13 - 3.16  3.89
0.3 per 1,000               3.07 - 3.17  2.94 - 2.98  2.75 - 2.79  3.62
1 per week, 15-min slots    2.56 - 2.61  2.34 - 2.39  2.09 - 2.13  3.18
==========================  ===========  ===========  ===========  ===========

(ARIMA(0,1,1) with theta -0.5 and 0, ARIMA(1,1,1) with phi 0.6, theta
-0.3.) Still, calibrate per model: the limit is cheap to compute.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import RuleError, StateFormatError
from ..statespace import LinearSystem

STATE_VERSION = 1


@dataclass(frozen=True)
class HorizonStat:
    """One reading scored from the anchor.

    Attributes
    ----------
    h : int
        Horizon of this reading from the anchor (1 = the anchor slot).
    forecast, variance : float
        f_h (with the reading's d_t) and F_h.
    error : float
        e_h = y - f_h (NaN for a missing reading).
    z : float
        e_h / sqrt(F_h).
    accumulated : float
        A_h, the mean h-step error so far over its standard deviation.
    readings : int
        Readings (not missing) in the accumulated sum.
    sum_variance : float
        S_h, the variance of the sum of the h-step errors so far.
    """

    h: int
    forecast: float
    variance: float
    error: float
    z: float
    accumulated: float
    readings: int
    sum_variance: float


class HorizonDrift:
    """The h-step error and its accumulated mean from a frozen anchor (module Notes).

    Parameters
    ----------
    system : LinearSystem
        The model's matrices (``Stream.system``).
    horizon : int
        H: readings per anchor window; re-anchored after H readings.
    """

    def __init__(self, system: LinearSystem, horizon: int) -> None:
        if isinstance(horizon, bool) or not isinstance(horizon, int) or horizon < 1:
            raise RuleError(f"horizon drift: horizon must be an integer >= 1, got {horizon!r}")
        self.system = system
        self.horizon = horizon
        self._Z = np.asarray(system.design, dtype=float)
        self._T = np.asarray(system.transition, dtype=float)
        self._RQR = np.asarray(system.state_cov, dtype=float)
        self._H = float(system.obs_cov)
        self.reset()

    # ------------------------------------------------------------ lifecycle
    def reset(self) -> None:
        """Forget the anchor; the next :meth:`assess` anchors afresh."""
        k = self._Z.shape[0]
        self._h = 0  # readings scored in this window
        self._a = np.zeros(k)
        self._P = np.zeros((k, k))
        self._w = np.zeros(k)
        self._sum_e = 0.0
        self._sum_var = 0.0
        self._n = 0
        self._step = 0
        self._anchored = False

    def request_anchor(self) -> None:
        """Re-anchor at the next reading (a refit, a re-anchored level, an operator's wish)."""
        self._anchored = False

    @property
    def anchored(self) -> bool:
        return self._anchored

    @property
    def h(self) -> int:
        """Readings scored since the anchor."""
        return self._h

    def anchor(self, state: np.ndarray, cov: np.ndarray, step: int) -> None:
        """Freeze the predicted state (a_s, P_s) of slot ``step`` as the anchor."""
        a = np.array(state, dtype=float)
        P = np.array(cov, dtype=float)
        k = self._Z.shape[0]
        if a.shape != (k,) or P.shape != (k, k):
            raise RuleError(f"horizon drift: anchor state must have shapes ({k},) and ({k}, {k}), "
                            f"got {a.shape} and {P.shape}")
        self.reset()
        self._a, self._P = a, P
        self._step = int(step)
        self._anchored = True

    # ---------------------------------------------------------------- scoring
    def assess(self, value: float, state: np.ndarray, cov: np.ndarray, step: int,
               one_step_forecast: float) -> HorizonStat:
        """Score the reading of slot ``step``.

        Parameters
        ----------
        value : float
            The reading (NaN: missing; the window advances, nothing is added).
        state, cov : ndarray
            The stream's predicted a_t and P_t for this slot, before the
            reading (``Stream.state``, ``Stream.cov``). Used only to anchor,
            and ``state`` to remove d_t (module Notes).
        step : int
            The slot's step (``Stream.step``).
        one_step_forecast : float
            The stream's forecast Z a_t + d_t of this slot (``Stream.peek(value).forecast``).
            A change of d_t inside a window (``Stream.shift_level``) moves
            f_h with it; call :meth:`request_anchor` after one.

        Returns
        -------
        HorizonStat
            Anchored afresh first when no anchor is held or H readings were scored.

        Raises
        ------
        RuleError
            A slot skipped or repeated inside a window.
        """
        if not self._anchored or self._h >= self.horizon:
            self.anchor(state, cov, step)
        elif step != self._step:
            raise RuleError(f"horizon drift: expected step {self._step}, got {step}; "
                            "feed every slot in order (NaN for a missing one)")
        Z, T = self._Z, self._T
        a_now = np.asarray(state, dtype=float)
        f = float(one_step_forecast) + float(Z @ (self._a - a_now))
        PZ = self._P @ Z
        F = float(Z @ PZ) + self._H
        cross = float(Z @ self._w)
        self._h += 1
        y = float(value)
        if y == y:
            e = y - f
            self._sum_e += e
            self._sum_var += F + 2.0 * cross
            self._n += 1
            z = e / math.sqrt(F)
        else:
            # a missing reading drops out of the sum: neither its variance
            # nor (below, in w) its covariances with later errors are added
            e = z = math.nan
        acc = self._sum_e / math.sqrt(self._sum_var) if self._n else math.nan
        # advance the frozen forecast to the next slot
        if y == y:
            self._w = T @ (self._w + PZ)
        else:
            self._w = T @ self._w
        self._a = T @ self._a + self.system.state_intercept(self._step)
        P = T @ self._P @ T.T + self._RQR
        self._P = 0.5 * (P + P.T)
        self._step += 1
        return HorizonStat(self._h, f, F, e, z, acc, self._n, self._sum_var)

    def assess_stream(self, value: float, stream) -> HorizonStat:
        """:meth:`assess` with everything read from a :class:`~leadline.detector.stream.Stream`.

        Call it before ``stream.update(value)``; the stream is not changed.
        """
        return self.assess(value, stream.state, stream.cov, stream.step, stream.peek(value).forecast)

    def forecast_from_anchor(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        """Z a^{(h)} + obs_intercept and F_h for the next ``n`` horizons of the current window.

        Without calendar terms or level offsets this is the h-step forecast
        mean and variance (statsmodels' ``predicted_mean``, ``var_pred_mean``).
        """
        if not self._anchored:
            raise RuleError("horizon drift: no anchor yet")
        a, P = self._a.copy(), self._P.copy()
        Z, T = self._Z, self._T
        mean, var = np.empty(n), np.empty(n)
        for j in range(n):
            mean[j] = float(Z @ a) + self.system.obs_intercept
            var[j] = float(Z @ P @ Z) + self._H
            a = T @ a + self.system.state_intercept(self._step + j)
            P = T @ P @ T.T + self._RQR
        return mean, var

    # ------------------------------------------------------------- save/load
    def state_dict(self) -> dict:
        """The running state as a JSON-serialisable dict (``"v": 1``); the system is not included."""
        return {"v": STATE_VERSION, "horizon": self.horizon, "k": int(self._Z.shape[0]),
                "anchored": self._anchored, "h": self._h, "step": self._step,
                "a": self._a.tolist(), "P": self._P.tolist(), "w": self._w.tolist(),
                "sum_e": self._sum_e, "sum_var": self._sum_var, "n": self._n}

    def load_state(self, state: dict) -> None:
        """Restore :meth:`state_dict` output, for the same system and horizon.

        Raises
        ------
        StateFormatError
            Another version, horizon or state dimension, or a missing key.
        """
        if not isinstance(state, dict) or state.get("v") != STATE_VERSION:
            got = state.get("v") if isinstance(state, dict) else type(state).__name__
            raise StateFormatError(f"horizon drift state: version {STATE_VERSION} expected, got {got!r}")
        k = int(self._Z.shape[0])
        try:
            if state["horizon"] != self.horizon or state["k"] != k:
                raise StateFormatError(f"horizon drift state: saved for horizon {state['horizon']} and k "
                                       f"{state['k']}, this statistic has horizon {self.horizon} and k {k}")
            a = np.asarray(state["a"], dtype=float)
            P = np.asarray(state["P"], dtype=float)
            w = np.asarray(state["w"], dtype=float)
            if a.shape != (k,) or P.shape != (k, k) or w.shape != (k,):
                raise StateFormatError(f"horizon drift state: arrays of shapes {a.shape}, {P.shape}, {w.shape}, "
                                       f"expected ({k},), ({k}, {k}), ({k},)")
            self._anchored = bool(state["anchored"])
            self._h, self._step, self._n = int(state["h"]), int(state["step"]), int(state["n"])
            self._sum_e, self._sum_var = float(state["sum_e"]), float(state["sum_var"])
        except KeyError as exc:
            raise StateFormatError(f"horizon drift state: missing key {exc}") from exc
        self._a, self._P, self._w = a, P, w


# ------------------------------------------------------------------ limits
def error_covariance(system: LinearSystem, cov: np.ndarray, horizon: int) -> np.ndarray:
    """C (H x H): the covariances of the h-step errors e_1..e_H from an anchor with P_s = ``cov`` (module Notes)."""
    Z = np.asarray(system.design, dtype=float)
    T = np.asarray(system.transition, dtype=float)
    RQR = np.asarray(system.state_cov, dtype=float)
    P = np.array(cov, dtype=float)
    C = np.empty((horizon, horizon))
    for i in range(horizon):
        v = P @ Z
        for j in range(i, horizon):
            C[i, j] = C[j, i] = float(Z @ v)
            v = T @ v
        C[i, i] += float(system.obs_cov)
        P = T @ P @ T.T + RQR
    return C


def calibrate_limit(system: LinearSystem, cov: np.ndarray, horizon: int, false_alarms_per_slot: float, *,
                    windows: int = 20_000, seed: int = 0) -> float:
    """The |A| limit whose alarm rate under the model is ``false_alarms_per_slot``.

    Draws ``windows`` anchor windows of h-step errors from N(0, C)
    (:func:`error_covariance`, seeded), computes max over m <= H of |A_m| in
    each, and returns the (1 - rate * H) quantile of those maxima. An alarm
    on A starts at most once per anchor window (the windows do not
    overlap), so the fraction of windows with an exceedance, divided by H,
    is the alarm rate per slot. A rate of 1 / H per slot or more is refused.

    Parameters
    ----------
    cov : ndarray
        P_s at the anchor: the stream's steady predicted covariance
        (``Stream.cov`` once ``Stream.is_steady``).

    Notes
    -----
    The quantile's error grows as the tail thins: with p = rate * H the
    sample has about windows * p exceedances; keep that above about 100
    (common practice for a Monte Carlo quantile). Because the maxima of a
    running mean are correlated over m, the limit lies well below the
    Bonferroni value z_{1 - rate/2}.
    """
    p = float(false_alarms_per_slot) * horizon
    if not 0.0 < p < 1.0:
        raise RuleError(f"horizon drift: false_alarms_per_slot * horizon must be in (0, 1), got {p}")
    C = error_covariance(system, cov, horizon)
    S = np.diag(np.cumsum(np.cumsum(C, axis=0), axis=1))
    vals, vecs = np.linalg.eigh(C)
    L = vecs * np.sqrt(np.clip(vals, 0.0, None))
    rng = np.random.default_rng(seed)
    maxima = np.empty(windows)
    chunk = 4096
    for start in range(0, windows, chunk):
        m = min(chunk, windows - start)
        errors = L @ rng.standard_normal((horizon, m))
        acc = np.abs(np.cumsum(errors, axis=0)) / np.sqrt(S)[:, None]
        maxima[start:start + m] = acc.max(axis=0)
    return float(np.quantile(maxima, 1.0 - p))
