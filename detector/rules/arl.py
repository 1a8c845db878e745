"""Average run lengths of the charts on standard normal input, computed, not simulated.

Used to choose limits for a stated false-alarm rate (:mod:`.thresholds`) and
checked against published tables in the tests.

Notes
-----
**Markov chain approximation** (Brook & Evans 1972). The chart statistic is
discretised into m states; R holds the transition probabilities among the
in-control states and the ARL from each state is

.. math::

    \\mathbf{L} = (I - R)^{-1} \\mathbf{1}.

*One-sided CUSUM* S_t = max(0, S_{t-1} + z_t - k) with decision interval h:
the width is w = 2h / (2m - 1); state 0 is S < w/2, state i > 0 is centred
on i w, and the chart signals when S > h. With z ~ N(mu, 1),

.. math::

    R_{i0} = \\Phi(w/2 - i w + k - \\mu), \\qquad
    R_{ij} = \\Phi((j + 1/2) w - i w + k - \\mu) - \\Phi((j - 1/2) w - i w + k - \\mu).

The two-sided ARL is taken from 1/L = 1/L^+ + 1/L^- (Lucas & Crosier 1982),
exact for a zero start when the two sides cannot both be above zero after
a signal, and a close approximation otherwise.

*EWMA* E_t = (1 - lambda) E_{t-1} + lambda z_t with limits +-c: 2m + 1 states
of width 2 delta = 2c / (2m + 1) centred on c_i = 2 i delta, i = -m..m
(Lucas & Saccucci 1990, appendix), with

.. math::

    R_{ij} = \\Phi\\!\\left(\\frac{c_j + \\delta - (1 - \\lambda) c_i}{\\lambda} - \\mu\\right)
           - \\Phi\\!\\left(\\frac{c_j - \\delta - (1 - \\lambda) c_i}{\\lambda} - \\mu\\right).

**Shewhart** |z| > c: ARL = 1 / P(|z| > c), geometric.

**Siegmund's approximation** for the one-sided CUSUM (Siegmund 1985;
Montgomery 2013, section 9.1.7): with Delta = mu - k and b = h + 1.166,
ARL = (exp(-2 Delta b) + 2 Delta b - 1) / (2 Delta^2), and b^2 at Delta = 0.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import brentq
from scipy.stats import norm

from ..errors import RuleError


def shewhart_arl(limit_abs_z: float, shift: float = 0.0) -> float:
    """ARL of the two-sided |z| > limit chart at a shift of the mean of z."""
    p = norm.sf(limit_abs_z - shift) + norm.cdf(-limit_abs_z - shift)
    return float(1.0 / p)


def _clipped_cdf(x: np.ndarray, shift: float, clip: float | None) -> np.ndarray:
    """P(min(c, max(-c, z)) <= x) for z ~ N(shift, 1): the normal cdf with point masses at +-c."""
    cdf = norm.cdf(x - shift)
    if clip is None:
        return cdf
    return np.where(x >= clip, 1.0, np.where(x < -clip, 0.0, cdf))


def cusum_one_sided_arl(k: float, h: float, shift: float = 0.0, head_start: float = 0.0, states: int = 100,
                        clip: float | None = None) -> float:
    """ARL of the upper CUSUM max(0, S + z - k) > h for z ~ N(shift, 1) (Brook & Evans 1972).

    With ``clip`` = c, z is winsorized at +-c first (its law then has point
    masses at +-c, which the transition probabilities include).
    """
    if h <= 0 or states < 2:
        raise RuleError(f"cusum ARL needs h > 0 and states >= 2, got h={h}, states={states}")
    m = states
    w = 2.0 * h / (2 * m - 1)
    centre = np.arange(m) * w
    upper_edges = (np.arange(m) + 0.5) * w  # upper edge of state j
    # P(next S <= upper edge of j | state i) = Phi(upper_j - centre_i + k - mu)
    cdf = _clipped_cdf(upper_edges[None, :] - centre[:, None] + k, shift, clip)
    R = np.diff(np.concatenate([np.zeros((m, 1)), cdf], axis=1), axis=1)
    L = np.linalg.solve(np.eye(m) - R, np.ones(m))
    if head_start <= 0:
        return float(L[0])
    i = int(round(head_start / w))
    return float(L[min(i, m - 1)])


def cusum_arl(k: float, h: float, shift: float = 0.0, states: int = 100, clip: float | None = None) -> float:
    """Two-sided CUSUM ARL from a zero start: 1/L = 1/L+ + 1/L- (Lucas & Crosier 1982)."""
    upper = cusum_one_sided_arl(k, h, shift, states=states, clip=clip)
    lower = cusum_one_sided_arl(k, h, -shift, states=states, clip=clip)
    return float(1.0 / (1.0 / upper + 1.0 / lower))


def siegmund_one_sided_arl(k: float, h: float, shift: float = 0.0) -> float:
    """Siegmund's approximation of the one-sided CUSUM ARL (see Notes)."""
    delta = shift - k
    b = h + 1.166
    if abs(delta) < 1e-9:
        return b * b
    return (math.exp(-2 * delta * b) + 2 * delta * b - 1) / (2 * delta * delta)


def ewma_arl(lam: float, limit_sigmas: float, shift: float = 0.0, states: int = 100) -> float:
    """ARL of the EWMA chart with asymptotic limits, from E_0 = 0 (Lucas & Saccucci 1990)."""
    if not 0 < lam <= 1:
        raise RuleError(f"ewma ARL needs lam in (0, 1], got {lam}")
    c = limit_sigmas * math.sqrt(lam / (2 - lam))
    m = states
    delta = c / (2 * m + 1)
    centres = 2 * delta * np.arange(-m, m + 1)
    shrunk = (1 - lam) * centres[:, None]
    hi = norm.cdf((centres[None, :] + delta - shrunk) / lam - shift)
    lo = norm.cdf((centres[None, :] - delta - shrunk) / lam - shift)
    R = hi - lo
    L = np.linalg.solve(np.eye(2 * m + 1) - R, np.ones(2 * m + 1))
    return float(L[m])


def _solve_increasing(arl_of, arl0: float, low: float, high: float, limit: float) -> float:
    """The x in [low, limit] with arl_of(x) = arl0, for an ARL increasing in x."""
    if arl0 <= 1:
        raise RuleError(f"target ARL must be > 1, got {arl0}")
    target = math.log(arl0)
    while arl_of(high) < arl0:
        low, high = high, high * 1.5
        if high > limit:
            raise RuleError(f"no limit below {limit} gives an in-control ARL of {arl0:.4g}")
    return float(brentq(lambda x: math.log(arl_of(x)) - target, low, high, xtol=1e-6))


def cusum_h_for_arl(k: float, arl0: float, states: int = 100, clip: float | None = None) -> float:
    """The decision interval h giving a two-sided in-control ARL of ``arl0`` (winsorized at ``clip``)."""
    return _solve_increasing(lambda h: cusum_arl(k, h, 0.0, states, clip), arl0, 1e-3, 2.0, 200.0)


def ewma_limit_for_arl(lam: float, arl0: float, states: int = 100) -> float:
    """L (in sigma_E) giving an in-control ARL of ``arl0`` with asymptotic limits."""
    return _solve_increasing(lambda L: ewma_arl(lam, L, 0.0, states), arl0, 0.1, 1.0, 12.0)
