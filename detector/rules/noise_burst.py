"""Noise burst rule: the innovations' spread rises for a while (a loose connection).

Notes
-----
The rule measures the spread of the last w standardized innovations by
their mean square successive difference (von Neumann 1941) [from memory]:

.. math::

    Q_t = \\tfrac12 \\sum_{j=t-w+2}^{t} (z_j - z_{j-1})^2

Successive differences make Q_t blind to the mean of z: a level shift inside
the window adds a single term, so a step (the CUSUM's business) is not
taken for a burst, while a burst raises every term. Under the model the z
are independent N(0, 1) and Q_t = z' A z with A = D'D / 2 for the
(w - 1) x w difference matrix D, so Q_t is distributed as a weighted sum of
independent chi-square(1) variables with the eigenvalues of A,

.. math::

    \\lambda_i = 1 - \\cos(\\pi i / w), \\qquad i = 1, \\dots, w - 1

(the eigenvalues of the path graph's Laplacian, halved). Its upper tail is
computed by the Lugannani-Rice saddlepoint approximation (Lugannani & Rice
1980; for quadratic forms Kuonen 1999, Biometrika 86) with the cumulant
generating function K(s) = -1/2 sum log(1 - 2 lambda_i s):

.. math::

    K'(\\hat s) = q, \\quad
    w = \\operatorname{sign}(\\hat s)\\sqrt{2(\\hat s q - K(\\hat s))}, \\quad
    u = \\hat s \\sqrt{K''(\\hat s)},

    P(Q > q) \\approx 1 - \\Phi(w) + \\varphi(w)\\,(1/u - 1/w).

The rule raises when Q_t exceeds the upper ``tail_probability`` quantile and
clears when it falls below the upper ``clear_probability`` quantile (the
deadband). Readings at or beyond ``screen_abs_z`` (the spike alarm limit)
are left out, since the spike rule already reports them; the differences
are then taken between consecutive valid values, and with n valid values
the limits are those for n (the same law with w replaced by n).

Heavy tails. With ``clip_abs_z`` = c each z is winsorized at +-c before it
enters the window. Winsorizing is a contraction, so Q can only shrink and
the limit stays conservative for normal innovations, while a single
heavy-tailed value adds at most about 2 c^2. For feeds whose innovations
have heavier tails than normal, :mod:`.thresholds` measures Q's upper
quantile on windows resampled from the training residuals and stores its
ratio to the normal-theory quantile as ``limit_scale`` (>= 1), which
multiplies every limit.
"""

from __future__ import annotations

import math
from collections import deque
from functools import lru_cache
from typing import Any

import numpy as np
from scipy.optimize import brentq
from scipy.stats import norm

from ..errors import RuleError
from ..innovation import Innovation
from .contract import BudgetContext, BuildContext, LimitKey, RuleBase, RuleEntry
from .lifecycle import Assessment, LifecycleConfig
from .tail_limits import MIN_RESIDUALS, _clip, _tail_quantiles

#: Defaults: window w, raise and clear tail probabilities, winsorizing bound.
DEFAULT_WINDOW = 24
DEFAULT_TAIL_PROBABILITY = 1e-4
DEFAULT_CLEAR_PROBABILITY = 0.05
DEFAULT_CLIP_ABS_Z = 4.0


def successive_difference_weights(n: int) -> np.ndarray:
    """The eigenvalues 1 - cos(pi i / n), i = 1..n-1, of the statistic's quadratic form."""
    return 1.0 - np.cos(np.pi * np.arange(1, n) / n)


def quadratic_form_sf(q: float, weights: np.ndarray) -> float:
    """P(sum w_i X_i^2 > q), X_i iid N(0, 1), by the Lugannani-Rice saddlepoint formula."""
    lam = np.asarray(weights, dtype=float)
    mean = float(lam.sum())
    if q <= 0:
        return 1.0

    def k1(s: float) -> float:
        return float(np.sum(lam / (1.0 - 2.0 * lam * s)))

    top = 1.0 / (2.0 * lam.max())
    if abs(q - mean) < 1e-9 * mean:
        q = mean * (1 + 1e-6)
    if q > mean:
        low, high = 0.0, top * (1 - 1e-15)
        while k1(high) < q:  # cannot happen for finite q, kept as a guard
            high = top - (top - high) / 10
    else:
        low, high = -1.0, 0.0
        while k1(low) > q:
            low *= 2.0
    s = brentq(lambda x: k1(x) - q, low, high, xtol=1e-15, rtol=1e-14, maxiter=500)
    one = 1.0 - 2.0 * lam * s
    K = -0.5 * float(np.sum(np.log(one)))
    K2 = float(np.sum(2.0 * lam * lam / (one * one)))
    w = math.copysign(math.sqrt(max(2.0 * (s * q - K), 0.0)), s)
    u = s * math.sqrt(K2)
    if abs(w) < 1e-8 or abs(u) < 1e-8:
        return 0.5
    return float(norm.sf(w) + norm.pdf(w) * (1.0 / u - 1.0 / w))


#: Largest tail or clear probability the limits are computed for.
MAX_PROBABILITY = 0.2


def burst_limit(n: int, tail_probability: float, limit_scale: float = 1.0) -> float:
    """The upper ``tail_probability`` quantile of Q for n valid values, times ``limit_scale``."""
    if n < 2:
        return math.inf
    if not 0 < tail_probability <= MAX_PROBABILITY:
        raise RuleError(f"noise_burst probabilities must be in (0, {MAX_PROBABILITY}], got {tail_probability!r}")
    return limit_scale * _burst_quantile(int(n), float(tail_probability))


@lru_cache(maxsize=1024)
def _burst_quantile(n: int, tail_probability: float) -> float:
    """The upper ``tail_probability`` quantile of Q for n valid values (cached: every refit of a
    feed asks for the same ones, each with its own ``limit_scale``)."""
    lam = successive_difference_weights(n)
    mean = float(lam.sum())
    sd = math.sqrt(2.0 * float(np.sum(lam * lam)))
    target = math.log(tail_probability)

    def f(q: float) -> float:
        return math.log(max(quadratic_form_sf(q, lam), 1e-300)) - target

    # P(Q > mean + sd/2) is about 0.3 for every n >= 3, above MAX_PROBABILITY
    low, high = mean + 0.5 * sd, mean + 10.0 * sd
    while f(high) > 0:
        high += 10.0 * sd
    return float(brentq(f, low, high, xtol=1e-9))


@lru_cache(maxsize=256)
def _limit_table(min_valid: int, window: int, tail_probability: float, limit_scale: float) -> tuple[float, ...]:
    """The raise (or clear) limit for n = 0..window valid values (infinite below ``min_valid``),
    one read-only tuple shared by every rule of these settings."""
    return (math.inf,) * min_valid + tuple(burst_limit(n, tail_probability, limit_scale)
                                           for n in range(min_valid, window + 1))


def successive_difference_statistic(values) -> float:
    """Q = 1/2 sum of squared successive differences (the Notes)."""
    return 0.5 * math.fsum((b - a) ** 2 for a, b in zip(values, values[1:]))


class NoiseBurstRule(RuleBase):
    """The spread of z over ``window`` steps, by successive differences, against its tail quantile.

    Parameters
    ----------
    window : int
        w, the number of steps (>= 3).
    tail_probability : float
        Raise when Q_t is above its upper quantile at this probability, in (0, 0.2].
    clear_probability : float
        Clear when Q_t is below its upper quantile at this probability
        (>= tail_probability, <= 0.2).
    screen_abs_z : float or None
        Leave out readings with |z| at or above this.
    clip_abs_z : float or None
        Winsorize z at +-this before it enters the window.
    limit_scale : float
        Multiplies the limits (>= 1; see Notes).
    min_valid : int or None
        Assess only when the window holds at least this many valid values
        (default w // 2).

    The window restarts after a re-anchoring of the level (it holds
    innovations scored against the old level).
    """

    name = "noise_burst"

    def __init__(self, window: int = DEFAULT_WINDOW, tail_probability: float = DEFAULT_TAIL_PROBABILITY,
                 clear_probability: float = DEFAULT_CLEAR_PROBABILITY,
                 screen_abs_z: float | None = None, clip_abs_z: float | None = None, limit_scale: float = 1.0,
                 min_valid: int | None = None) -> None:
        if isinstance(window, bool) or not isinstance(window, int) or window < 3:
            raise RuleError(f"noise_burst window must be an integer >= 3, got {window!r}")
        if not 0 < tail_probability <= MAX_PROBABILITY:
            raise RuleError(f"noise_burst tail_probability must be in (0, {MAX_PROBABILITY}], "
                            f"got {tail_probability!r}")
        if not tail_probability <= clear_probability <= MAX_PROBABILITY:
            raise RuleError(f"noise_burst clear_probability must be in [tail_probability, {MAX_PROBABILITY}], "
                            f"got {clear_probability!r}")
        if not (math.isfinite(limit_scale) and limit_scale >= 1):
            raise RuleError(f"noise_burst limit_scale must be a finite number >= 1, got {limit_scale!r}")
        if clip_abs_z is not None and not clip_abs_z > 0:
            raise RuleError(f"noise_burst clip_abs_z must be > 0 or None, got {clip_abs_z!r}")
        if screen_abs_z is not None and not screen_abs_z > 0:
            raise RuleError(f"noise_burst screen_abs_z must be > 0 or None, got {screen_abs_z!r}")
        self.window = window
        self.tail_probability = float(tail_probability)
        self.clear_probability = float(clear_probability)
        self.screen_abs_z = None if screen_abs_z is None else float(screen_abs_z)
        self.clip_abs_z = None if clip_abs_z is None else float(clip_abs_z)
        self.limit_scale = float(limit_scale)
        self.min_valid = max(3, window // 2) if min_valid is None else int(min_valid)
        if not 3 <= self.min_valid <= window:
            raise RuleError(f"noise_burst min_valid must be in [3, window={window}], got {min_valid!r}")
        # limits for n = 0..w valid values, computed once and shared by every rule of these settings
        self._raise = _limit_table(self.min_valid, window, self.tail_probability, self.limit_scale)
        self._clear = _limit_table(self.min_valid, window, self.clear_probability, self.limit_scale)
        self.reset()

    def parameters(self) -> dict[str, Any]:
        return {"window": self.window, "tail_probability": self.tail_probability,
                "clear_probability": self.clear_probability, "screen_abs_z": self.screen_abs_z,
                "clip_abs_z": self.clip_abs_z, "limit_scale": self.limit_scale, "min_valid": self.min_valid}

    @property
    def statistic(self) -> float:
        """Q_t over the valid values in the window."""
        return self._q

    @property
    def valid(self) -> int:
        return self._valid

    def limit(self) -> float:
        """The raise level for the window's current number of valid values."""
        return self._raise[self._valid]

    def reset(self) -> None:
        self._values: deque[float | None] = deque()
        # (b - a)^2 of each pair of successive valid values in the window, oldest first:
        # Q is their fsum, kept pair by pair instead of rebuilt from the window at every step
        self._squares: deque[float] = deque()
        self._last_valid: float | None = None
        self._q = 0.0
        self._valid = 0

    def level_moved(self) -> None:
        self.reset()

    def status(self) -> dict[str, Any]:
        limit = self.limit()
        return {"sum_z2": self.statistic, "valid": self.valid, "limit": limit if math.isfinite(limit) else None}

    def state_dict(self) -> dict[str, Any]:
        """The window's values (None where a reading was screened out), as plain JSON values."""
        return {"v": self.STATE_VERSION, "window": list(self._values)}

    def load_state(self, state: Any) -> None:
        state = self._check_state(state)
        self.reset()
        self._values.extend(None if v is None else float(v) for v in state["window"])
        self._recount()

    def _push(self, z: float | None) -> None:
        self._values.append(z)
        if z is not None:
            if self._last_valid is not None:
                self._squares.append((z - self._last_valid) ** 2)
            self._last_valid = z
            self._valid += 1
        if len(self._values) > self.window and self._values.popleft() is not None:
            self._valid -= 1
            if self._squares:  # the oldest valid value leaves, and its pair with the next one
                self._squares.popleft()
            if self._valid == 0:
                self._last_valid = None
        self._q = 0.5 * math.fsum(self._squares)

    def _recount(self) -> None:
        valid = [v for v in self._values if v is not None]
        self._valid = len(valid)
        self._squares = deque((b - a) ** 2 for a, b in zip(valid, valid[1:]))
        self._last_valid = valid[-1] if valid else None
        self._q = successive_difference_statistic(valid)

    def _clipped(self, z: Any) -> np.ndarray:
        z = np.asarray(z, dtype=float).ravel()
        c = self.clip_abs_z
        return z if c is None else np.clip(z, -c, c)

    def quiet_run_length(self, z: Any) -> int:
        """How many of the next ``z`` (finite, below the screen) keep Q_t under its raise limit.

        Q_t is computed for every step at once from cumulative sums, which
        round differently from the rule's exact sum; a step within 1e-9 of
        its limit counts as reaching it, so that the caller leaves it to
        :meth:`assess`.
        """
        new = self._clipped(z)
        if new.size == 0:
            return 0
        old = np.array([math.nan if v is None else v for v in self._values], dtype=float)
        x = np.concatenate([old, new])
        valid = np.flatnonzero(np.isfinite(x))
        squares = np.zeros(x.size)
        squares[valid[1:]] = (x[valid[1:]] - x[valid[:-1]]) ** 2
        total = np.cumsum(squares)
        counted = np.concatenate([[0], np.cumsum(np.isfinite(x))])
        end = old.size + np.arange(new.size)
        start = np.maximum(end - self.window + 1, 0)
        n = counted[end + 1] - counted[start]
        first = valid[np.searchsorted(valid, start)]
        q = 0.5 * (total[end] - total[first])
        limit = np.asarray(self._raise)[n]
        reaches = (n >= self.min_valid) & (q > limit * (1.0 - 1e-9))
        return int(new.size if not reaches.any() else np.argmax(reaches))

    def extend_quiet(self, z: Any) -> None:
        """Take many z that :meth:`quiet_run_length` passed: the window as :meth:`assess` leaves it."""
        values = list(self._values) + self._clipped(z)[-self.window:].tolist()
        self._values = deque(values[-self.window:])
        self._recount()

    def quiet_statistic(self, z: float) -> float | None:
        """Q_t after :meth:`assess` of a finite ``z`` below the screen, judged before the window
        moves; None when it would reach the raise limit, with the margin of
        :meth:`quiet_run_length` (a relative 1e-9: a step that close is left to :meth:`assess`)."""
        c = self.clip_abs_z
        if c is not None:
            z = c if z > c else (-c if z < -c else z)
        squares = list(self._squares)
        if self._last_valid is not None:
            squares.append((z - self._last_valid) ** 2)
        valid = self._valid + 1
        if len(self._values) >= self.window and self._values[0] is not None:
            valid -= 1
            if squares:
                del squares[0]
        q = 0.5 * math.fsum(squares)  # the sum _push takes, over the same squares in the same order
        if valid >= self.min_valid and q > self._raise[valid] * (1.0 - 1e-9):
            return None
        return q

    def push_quiet(self, z: float, q: float) -> None:
        """Take a ``z`` that :meth:`quiet_statistic` passed, with the Q_t it gave: the window as
        :meth:`assess` leaves it."""
        c = self.clip_abs_z
        if c is not None:
            z = c if z > c else (-c if z < -c else z)
        values, squares = self._values, self._squares
        values.append(z)
        if self._last_valid is not None:
            squares.append((z - self._last_valid) ** 2)
        self._last_valid = z
        self._valid += 1
        if len(values) > self.window and values.popleft() is not None:
            self._valid -= 1
            if squares:
                squares.popleft()
        self._q = q

    def assess(self, innovation: Innovation) -> Assessment | None:
        z = innovation.z
        if not math.isfinite(z):
            return None
        a = abs(z)
        screened = self.screen_abs_z is not None and a >= self.screen_abs_z
        c = self.clip_abs_z
        if c is not None:
            z = c if z > c else (-c if z < -c else z)
        self._push(None if screened else z)
        n = self._valid
        if n < self.min_valid:
            return Assessment(None, False, a)
        q = self._q
        if q > self._raise[n]:
            ratio = math.sqrt(q / (n - 1))
            detail = (f"innovation spread about {ratio:.2f} times the model's over the last {len(self._values)} "
                      f"readings (successive-difference statistic {q:.1f} > {self._raise[n]:.1f} "
                      f"at tail probability {self.tail_probability:.2g})")
            return Assessment("alarm", False, a, detail)
        return Assessment(None, q < self._clear[n], a)


# ------------------------------------------------------------ registry entry
def sigma_limits(options: dict[str, Any]) -> dict[str, Any]:
    return {"window": int(options["noise_window"]), "tail_probability": float(options["noise_tail_probability"]),
            "clip_abs_z": options["noise_clip_abs_z"], "limit_scale": 1.0}


def budget_limits(ctx: BudgetContext, options: dict[str, Any]) -> dict[str, Any]:
    """Tail probability p_r; ``limit_scale`` from resampled windows (see :mod:`.thresholds`)."""
    window, clip = int(options["noise_window"]), options["noise_clip_abs_z"]
    rate = ctx.rate * ctx.shares["noise_burst"]
    return {"window": window, "tail_probability": rate, "clip_abs_z": clip,
            "limit_scale": noise_limit_scale(ctx.calm, window, rate, clip, seed=ctx.seed)}


def build(section: Any, ctx: BuildContext) -> NoiseBurstRule:
    tail = section["tail_probability"]
    return NoiseBurstRule(int(section["window"]), tail,
                          max(tail, section.get("clear_probability", DEFAULT_CLEAR_PROBABILITY)),
                          screen_abs_z=ctx.screen_abs_z, clip_abs_z=section.get("clip_abs_z"),
                          limit_scale=section["limit_scale"])


ENTRY = RuleEntry(
    name="noise_burst", kind="innovation", build=build,
    lifecycle=LifecycleConfig(1, 1, 3),
    budget_share=0.15,
    limit_keys=(LimitKey("noise_window", DEFAULT_WINDOW, low=3, integer=True),
                LimitKey("noise_tail_probability", DEFAULT_TAIL_PROBABILITY, low=0, low_open=True,
                         high=MAX_PROBABILITY, modes=("sigma",)),
                LimitKey("noise_clip_abs_z", DEFAULT_CLIP_ABS_Z, low=0, low_open=True, winsorizing=True)),
    required=("window", "tail_probability", "limit_scale"),
    sigma_limits=sigma_limits, budget_limits=budget_limits,
)


def noise_limit_scale(z: np.ndarray, window: int, rate: float, clip_abs_z: float | None, seed: int = 0,
                      windows: int = 100_000) -> float:
    """max(1, Q_E / Q_G) from windows of resampled residuals (see the Notes)."""
    z = np.asarray(z, dtype=float)
    z = z[np.isfinite(z)]
    if z.size < MIN_RESIDUALS:
        return 1.0
    rng = np.random.default_rng(seed)
    q = []
    for chunk in range(0, windows, 20_000):
        draws = _clip(rng.choice(z, size=(min(20_000, windows - chunk), window)), clip_abs_z)
        q.append(0.5 * (np.diff(draws, axis=1) ** 2).sum(axis=1))
    q_emp = float(_tail_quantiles(np.sort(np.concatenate(q)), rate))
    return max(1.0, q_emp / burst_limit(window, rate))
