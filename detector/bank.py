"""Many streams of the same state dimension, advanced in one numpy call.

A replay of history or a site with thousands of feeds steps every feed at
the same slot. :class:`StreamBank` holds N streams with k states each as
stacked arrays and runs the same recursion as :class:`~.stream.Stream`
(see its module Notes for the equations) for all N at once. Series whose
covariance has converged use their steady-state gain; the others, and the
ones with a missing reading, take the full covariance step.

=====================  ==============  =========
what                   name            shape
=====================  ==============  =========
a_t                    ``state``       (N, k)
P_t                    ``cov``         (N, k, k)
T                      ``transition``  (N, k, k)
Z                      ``design``      (N, k)
R Q R'                 ``state_cov``   (N, k, k)
H, d                   ``obs_cov``,    (N,)
                       ``obs_intercept``
K (steady), F (steady) ``gain``,       (N, k), (N,)
                       ``variance``
=====================  ==============  =========
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.stats import norm

from .statespace import LinearSystem
from .stream import STEADY_RTOL, Stream


@dataclass(frozen=True)
class BankStep:
    """One slot of every series in a bank; arrays of shape (N,)."""

    step: np.ndarray
    forecast: np.ndarray
    error: np.ndarray
    variance: np.ndarray
    z: np.ndarray
    lower: np.ndarray
    upper: np.ndarray


def _matvec(m: np.ndarray, v: np.ndarray) -> np.ndarray:
    return np.matmul(m, v[..., None])[..., 0]


class StreamBank:
    """N streams with the same number of states k, stepped together.

    Parameters
    ----------
    streams : sequence of Stream
        Each gives its system, state and position. Calendar regression is
        not held in the bank: pass its offsets to :meth:`update` instead.
    level : float
        Coverage of the forecast intervals.
    """

    def __init__(self, streams: Sequence[Stream], level: float = 0.95) -> None:
        if not streams:
            raise ValueError("a StreamBank needs at least one stream")
        k = streams[0].system.k_states
        bad = [i for i, s in enumerate(streams) if s.system.k_states != k]
        if bad:
            raise ValueError(f"all streams in a bank need {k} states; streams {bad[:5]} differ")
        self.level = float(level)
        self._quantile = float(norm.ppf(0.5 + level / 2.0))
        n = len(streams)
        self.design = np.stack([s.system.design for s in streams])
        self.transition = np.stack([s.system.transition for s in streams])
        self.state_cov = np.stack([s.system.state_cov for s in streams])
        self.obs_cov = np.array([s.system.obs_cov for s in streams])
        self.obs_intercept = np.array([s.system.obs_intercept + s.level_offset for s in streams])
        self.intercept_const = np.stack([s.system.state_intercept_const for s in streams])
        self.intercept_slope = np.stack([s.system.state_intercept_slope for s in streams])
        self._has_slope = bool(np.any(self.intercept_slope))
        self.state = np.stack([s.state for s in streams])
        self.cov = np.stack([s.cov for s in streams])
        self.step = np.array([s.step for s in streams], dtype=np.int64)
        self.steady = np.zeros(n, dtype=bool)
        self.gain = np.zeros((n, k))
        self.variance = np.zeros(n)
        self._meta = [(s.model_version, s.meta, s.regression) for s in streams]
        self._refresh_steady(np.array([s.is_steady for s in streams]))

    def __len__(self) -> int:
        return self.state.shape[0]

    @property
    def nbytes_per_series(self) -> float:
        """Bytes of numeric state held per series."""
        arrays = (self.design, self.transition, self.state_cov, self.obs_cov, self.obs_intercept,
                  self.intercept_const, self.intercept_slope, self.state, self.cov, self.step,
                  self.steady, self.gain, self.variance)
        return sum(a.nbytes for a in arrays) / len(self)

    def _refresh_steady(self, rows: np.ndarray) -> None:
        """Freeze F and K for ``rows`` (a boolean mask) from their current P."""
        if not rows.any():
            return
        idx = np.flatnonzero(rows)
        PZ = _matvec(self.cov[idx], self.design[idx])
        F = np.einsum("nk,nk->n", self.design[idx], PZ) + self.obs_cov[idx]
        self.variance[idx] = F
        self.gain[idx] = _matvec(self.transition[idx], PZ) / F[:, None]
        self.steady[idx] = True

    def update(self, values: np.ndarray, absorb: np.ndarray | None = None,
               offsets: np.ndarray | None = None) -> BankStep:
        """Score one slot of every series and advance them.

        Parameters
        ----------
        values : ndarray, shape (N,)
            Readings, NaN for missing.
        absorb : ndarray of bool, optional
            False where a reading should be scored but not move the state.
        offsets : ndarray, optional
            Extra observation intercepts for this slot (calendar terms x_t' beta).
        """
        y = np.asarray(values, dtype=float)
        if y.shape != self.step.shape:
            raise ValueError(f"values must have shape {self.step.shape}, got {y.shape}")
        d = self.obs_intercept if offsets is None else self.obs_intercept + offsets
        forecast = np.einsum("nk,nk->n", self.design, self.state) + d
        error = y - forecast
        observed = np.isfinite(y)
        if absorb is not None:
            observed &= np.asarray(absorb, dtype=bool)
        variance = self.variance.copy()
        gain = self.gain.copy()

        full = ~self.steady | ~observed
        if full.any():
            idx = np.flatnonzero(full)
            P, Z, T = self.cov[idx], self.design[idx], self.transition[idx]
            PZ = _matvec(P, Z)
            F = np.einsum("nk,nk->n", Z, PZ) + self.obs_cov[idx]
            variance[idx] = F
            obs = observed[idx]
            gain[idx] = np.where(obs[:, None], _matvec(T, PZ) / F[:, None], 0.0)
            P_filtered = P - np.where(obs[:, None, None], PZ[:, :, None] * PZ[:, None, :] / F[:, None, None], 0.0)
            P_next = T @ P_filtered @ np.swapaxes(T, 1, 2) + self.state_cov[idx]
            P_next = 0.5 * (P_next + np.swapaxes(P_next, 1, 2))
            change = np.max(np.abs(P_next - P), axis=(1, 2))
            scale = np.maximum(1.0, np.max(np.abs(P_next), axis=(1, 2)))
            self.cov[idx] = P_next
            self.steady[idx] = False
            converged = np.zeros_like(self.steady)
            converged[idx] = obs & (change <= STEADY_RTOL * scale)
        else:
            converged = None

        innovation = np.where(observed, error, 0.0)
        c = self.intercept_const
        if self._has_slope:
            c = c + self.intercept_slope * self.step[:, None]
        self.state = _matvec(self.transition, self.state) + gain * innovation[:, None] + c
        step = self.step.copy()
        self.step += 1
        if converged is not None:
            self._refresh_steady(converged)

        sd = np.sqrt(variance)
        error = np.where(np.isfinite(y), error, np.nan)
        half = self._quantile * sd
        return BankStep(step, forecast, error, variance, error / sd, forecast - half, forecast + half)

    def shift_level(self, index: int, delta: float) -> None:
        """Re-anchor series ``index`` (see :meth:`Stream.shift_level`)."""
        self.obs_intercept[index] += float(delta)

    def to_streams(self) -> list[Stream]:
        """The bank's series as separate :class:`Stream` objects, in order."""
        out = []
        for i, (version, meta, regression) in enumerate(self._meta):
            system = LinearSystem(self.design[i].copy(), 0.0, float(self.obs_cov[i]), self.transition[i].copy(),
                                  self.intercept_const[i].copy(), self.intercept_slope[i].copy(),
                                  self.state_cov[i].copy())
            out.append(Stream(system, self.state[i], self.cov[i], int(self.step[i]), level=self.level,
                              model_version=version, regression=regression, meta=meta,
                              level_offset=float(self.obs_intercept[i]), steady=bool(self.steady[i])))
        return out
