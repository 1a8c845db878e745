"""How far to re-anchor the forecasts after a CUSUM-confirmed level shift.

The CUSUM's own estimate (k + S/N, :mod:`.cusum`) is the mean shift of z over
the run. That is the level shift itself only when the model did not follow
the new level. When the filter absorbed some of the shifted readings, its
state already carries part of the shift and the innovations shrink: for an
AR(1) they settle at (1 - phi) times the shift, for a random walk at zero.
This module undoes that with the model's own step response, and also finds
where in the run the step most likely happened.

Notes
-----
Let the readings jump by D at step s of the run. With the steady gain
K = T P Z' / F, the expected state deviation a_j (per unit D) and the expected
innovation v_j = D g_j follow (Durbin & Koopman 2012, eq. 4.24, applied to
a deterministic step)

.. math::

    g_j = 1 - Z a_j, \\qquad a_{j+1} = T a_j + b_j K g_j, \\qquad a_s = 0,

with b_j = 1 when reading j was absorbed and 0 when it was not (or missing).
K is taken at its current value for the whole run: exact in the steady
state, close otherwise (an unabsorbed reading moves the filter off its
steady gain for a while).
Since z_j = v_j / sqrt(F_j), with w_j = g_j / sqrt(F_j) least squares gives

.. math::

    \\hat D_s = \\frac{\\sum_{j \\ge s} w_j z_j}{\\sum_{j \\ge s} w_j^2},
    \\qquad \\operatorname{se}(\\hat D_s) = \\Big(\\sum_{j \\ge s} w_j^2\\Big)^{-1/2},

and the step's position is the s that maximises the explained sum of squares
(\\sum w_j z_j)^2 / \\sum w_j^2: the maximum likelihood change point for a
Gaussian mean shift (Hinkley 1971) [from memory].

After the run the state holds D a_N. Its transient part dies out on its own;
the part on the model's unit roots, Z T^M a_N for large M, stays for good. So
the forecasts are moved by

.. math::

    \\delta = \\hat D\\,(1 - Z T^{M} a_N),

which is D̂ for a stationary model and 0 for a random walk that has already
followed the step.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

#: Steps used for the persistent part Z T^M a_N.
PERSIST_STEPS = 4096
#: Longest run searched for the change point.
MAX_RUN_STEPS = 128


@dataclass(frozen=True, slots=True)
class LevelShiftEstimate:
    """A level shift estimated from a run of innovations.

    Attributes
    ----------
    size : float
        D̂, the shift of the readings, in reading units.
    std_error : float
        se(D̂), in reading units.
    delta : float
        The amount to add to the forecasts (``Stream.shift_level``).
    start : int
        Index in the run of the first reading after the step.
    """

    size: float
    std_error: float
    delta: float
    start: int

    @property
    def t_statistic(self) -> float:
        return self.size / self.std_error if self.std_error > 0 else math.nan


def _gain(system, cov: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    Z = np.asarray(system.design, dtype=float)
    T = np.asarray(system.transition, dtype=float)
    P = np.asarray(cov, dtype=float)
    PZ = P @ Z
    F = float(Z @ PZ) + float(system.obs_cov)
    K = (T @ PZ) / F if F > 0 else np.zeros_like(Z)
    return Z, T, K


def _fit_from(Z, T, K, run, s: int) -> tuple[float, float, np.ndarray]:
    a = np.zeros_like(Z)
    num = den = 0.0
    for z, std, absorbed in run[s:]:
        g = 1.0 - float(Z @ a)
        ok = math.isfinite(z) and std > 0
        if ok:
            w = g / std
            num += w * z
            den += w * w
        a = T @ a + (K * g if absorbed and ok else 0.0)
    return num, den, a


def estimate_level_shift(system, cov: np.ndarray, run: Sequence[tuple[float, float, bool]],
                         search: bool = True) -> LevelShiftEstimate | None:
    """Estimate the level shift in a run of innovations (see the module Notes).

    Parameters
    ----------
    system : LinearSystem
        The model's matrices (``design`` Z, ``transition`` T, ``obs_cov`` H).
    cov : ndarray
        P_t, for the gain K = T P Z' / F.
    run : sequence of (z, std, absorbed)
        The run's steps in time order; z NaN for a missing slot.
    search : bool
        Search the run for the change point; otherwise the step is at its start.

    Returns
    -------
    LevelShiftEstimate or None
        None when the run has no usable step.
    """
    run = list(run)[-MAX_RUN_STEPS:]
    if not run:
        return None
    Z, T, K = _gain(system, cov)
    starts = range(len(run)) if search else range(1)
    best = None
    for s in starts:
        if not math.isfinite(run[s][0]):
            continue
        num, den, a = _fit_from(Z, T, K, run, s)
        if den > 0 and (best is None or num * num / den > best[0]):
            best = (num * num / den, num, den, a, s)
    if best is None:
        return None
    _, num, den, a, s = best
    size = num / den
    persist = float(Z @ np.linalg.matrix_power(T, PERSIST_STEPS) @ a)
    if not math.isfinite(persist):
        persist = 0.0
    return LevelShiftEstimate(size, 1.0 / math.sqrt(den), size * (1.0 - persist), s)
