"""Flatline rule: the same reading repeated for longer than the model finds plausible.

Notes
-----
Under the model the next reading is y_t ~ N(f_t, F_t) given the past
(f_t the one-step forecast, F_t its variance; Durbin & Koopman 2012,
section 4.3). The probability that it repeats the previous reading within
a half-width w is

.. math::

    p_t = P(|y_t - y_{t-1}| \\le w \\mid y_{1:t-1})
        = \\Phi\\!\\left(\\frac{y_{t-1} + w - f_t}{\\sqrt{F_t}}\\right)
        - \\Phi\\!\\left(\\frac{y_{t-1} - w - f_t}{\\sqrt{F_t}}\\right)

with w = max(tolerance, resolution / 2): for readings quantized to a
resolution q, two equal readings mean the underlying value stayed in one
bin of width q. By the chain rule of probability, a run of repeats from
step s to step t has probability

.. math::

    P_{s:t} = \\prod_{j=s}^{t} p_j

(exactly so when each factor is taken under the one-step distribution of
that step, which is what the stream supplies as it absorbs the repeated
readings). The rule alarms when P_{s:t} < ``run_probability_limit`` and
clears when a reading differs from its predecessor. No count of repeats is
fixed: a quiet feed with small F_t needs more repeats, a noisy one fewer.

The false-alarm rate is bounded by the limit. For a run starting at s,
M_t = prod_{j=s}^{t} 1{repeat at j} / p_j is a non-negative martingale with
mean 1 under the model, and an alarm at t means M_t = 1 / P_{s:t} > 1 / limit.
By Ville's inequality, P(sup_t M_t >= 1 / limit) <= limit, so each starting
point gives an alarm with probability at most ``run_probability_limit``,
and false alarms per reading stay below it [derived; Ville's inequality
from memory].

With zero tolerance and zero resolution, an exact repeat of a continuous
reading has probability 0 and alarms at once.

**The feed's own habits.** A quantized meter, a flow parked at a set point
or a register that does not move at night repeats its reading far more
often than a Gaussian F_t allows. With the training window's repeat counts
(:class:`~.repeat_habits.RepeatHabits`), each factor is

.. math::

    p_t = \\max\\big(p_t^{\\text{model}},\\ \\hat p_{y_{t-1}}\\big)

the larger of the model's probability and the feed's own rate of repeating
that value, and no run is reported before it outlasts the longest run of
that value in training. A frozen transmitter holding a value it seldom
held gets the small pooled rate and is found within a few dozen readings.
"""

from __future__ import annotations

import math
from typing import Any

from ..errors import RuleError
from ..innovation import Innovation
from .contract import BudgetContext, BuildContext, LimitKey, RuleBase, RuleEntry
from .lifecycle import Assessment, LifecycleConfig
from .repeat_habits import RepeatHabits, learn_repeat_habits

#: Default run probability limit (sigma mode).
DEFAULT_RUN_PROBABILITY_LIMIT = 1e-6

_SQRT2 = math.sqrt(2.0)


def _normal_interval_probability(lo: float, hi: float) -> float:
    """Phi(hi) - Phi(lo) for lo <= hi, accurate in both tails."""
    if lo >= 0:
        return 0.5 * (math.erfc(lo / _SQRT2) - math.erfc(hi / _SQRT2))
    if hi <= 0:
        return 0.5 * (math.erfc(-hi / _SQRT2) - math.erfc(-lo / _SQRT2))
    return 1.0 - 0.5 * (math.erfc(hi / _SQRT2) + math.erfc(-lo / _SQRT2))


def repeat_probability(previous: float, forecast: float, std: float, half_width: float) -> float:
    """p_t = P(|y_t - previous| <= half_width) for y_t ~ N(forecast, std^2).

    See the module Notes.
    """
    if half_width <= 0:
        return 0.0
    return max(0.0, _normal_interval_probability((previous - half_width - forecast) / std,
                                                 (previous + half_width - forecast) / std))


def estimate_resolution(values) -> float:
    """The quantization step of ``values``: the smallest positive gap between distinct readings.

    Gaps below 1e-9 of the readings' scale are taken as float noise and
    ignored. Returns 0.0 when there are fewer than two distinct readings.
    """
    import numpy as np

    x = np.unique(np.asarray(values, dtype=float)[np.isfinite(values)])
    if x.size < 2:
        return 0.0
    gaps = np.diff(x)
    scale = max(float(np.max(np.abs(x))), 1e-300)
    gaps = gaps[gaps > 1e-9 * scale]
    return float(gaps.min()) if gaps.size else 0.0


class FlatlineRule(RuleBase):
    """A run of repeated readings, judged by its probability under the model.

    Parameters
    ----------
    tolerance : float
        Two readings are the same when they differ by at most this (>= 0,
        in reading units).
    resolution : float
        The reading's quantization step (>= 0, in reading units); 0 when
        readings are not quantized.
    run_probability_limit : float
        Alarm when the run's probability falls below this, in (0, 1).
    habits : RepeatHabits or None
        The feed's repeat counts from training (module Notes); None: the
        model's probability alone.
    """

    name = "flatline"

    def __init__(self, tolerance: float = 0.0, resolution: float = 0.0,
                 run_probability_limit: float = DEFAULT_RUN_PROBABILITY_LIMIT,
                 habits: RepeatHabits | None = None) -> None:
        if not (math.isfinite(tolerance) and tolerance >= 0):
            raise RuleError(f"flatline tolerance must be a finite number >= 0, got {tolerance!r}")
        if not (math.isfinite(resolution) and resolution >= 0):
            raise RuleError(f"flatline resolution must be a finite number >= 0, got {resolution!r}")
        if not 0 < run_probability_limit < 1:
            raise RuleError(f"flatline run_probability_limit must be in (0, 1), got {run_probability_limit!r}")
        self.tolerance = float(tolerance)
        self.resolution = float(resolution)
        self.run_probability_limit = float(run_probability_limit)
        self.half_width = max(self.tolerance, self.resolution / 2.0)
        if habits is not None and not isinstance(habits, RepeatHabits):
            raise RuleError(f"flatline habits must be RepeatHabits or None, got {type(habits).__name__}")
        self.habits = habits
        self._log_limit = math.log(self.run_probability_limit)
        self.reset()

    def parameters(self) -> dict[str, Any]:
        return {"tolerance": self.tolerance, "resolution": self.resolution,
                "run_probability_limit": self.run_probability_limit}

    @property
    def run_steps(self) -> int:
        """Repeats in the current run (0 when the last reading differed)."""
        return self._run

    @property
    def log_run_probability(self) -> float:
        """log P of the current run (0 when there is no run)."""
        return self._log_p

    def reset(self) -> None:
        self._previous: float | None = None
        self._run = 0
        self._log_p = 0.0

    def status(self) -> dict[str, Any]:
        log_p = self._log_p
        return {"run_steps": self._run, "log10_run_probability": log_p / math.log(10) if math.isfinite(log_p) else None}

    def state_dict(self) -> dict[str, Any]:
        """The previous reading, the run length and log P of the run, as plain JSON values.

        log P is -inf after an impossible repeat; it is saved as None.
        """
        return {"v": self.STATE_VERSION, "previous": self._previous, "run_steps": self._run,
                "log_run_probability": self._log_p if math.isfinite(self._log_p) else None}

    def load_state(self, state: Any) -> None:
        state = self._check_state(state)
        self._previous = None if state["previous"] is None else float(state["previous"])
        self._run = int(state["run_steps"])
        log_p = state["log_run_probability"]
        self._log_p = -math.inf if log_p is None else float(log_p)

    def run_state(self) -> tuple[float | None, int, float]:
        """``(previous reading, run steps, log P)``, for a caller that judges repeats itself
        exactly as :meth:`assess` does (the replay's quiet runs); see :meth:`resume`."""
        return self._previous, self._run, self._log_p

    def resume(self, state: tuple[float | None, int, float]) -> None:
        """Take back a :meth:`run_state` advanced with no alarm."""
        self._previous, self._run, self._log_p = state

    def assess(self, innovation: Innovation) -> Assessment | None:
        """Judge one reading against the previous one; None for a missing reading."""
        y = innovation.value
        if not math.isfinite(y):
            return None
        previous = self._previous
        self._previous = y
        a = abs(innovation.z) if math.isfinite(innovation.z) else math.nan
        if previous is None or abs(y - previous) > self.tolerance:
            self._run = 0
            self._log_p = 0.0
            return Assessment(None, True, a)
        p = repeat_probability(previous, innovation.forecast, innovation.std, self.half_width)
        habitual_run = 0
        if self.habits is not None:
            p = max(p, self.habits.probability(previous))
            habitual_run = self.habits.longest_run(previous)
        self._run += 1
        self._log_p += math.log(p) if p > 0 else -math.inf
        if self._log_p < self._log_limit and self._run > habitual_run:
            shown = "0" if self._log_p == -math.inf else f"{math.exp(self._log_p):.2g}"
            detail = (f"reading {y:.6g} repeated {self._run} time{'' if self._run == 1 else 's'} (within {self.half_width:.3g}); "
                      f"probability of such a run under the model {shown} < {self.run_probability_limit:.2g}")
            return Assessment("alarm", False, a, detail)
        return Assessment(None, False, a)


# ------------------------------------------------------------ registry entry
def sigma_limits(options: dict[str, Any]) -> dict[str, Any]:
    return {"run_probability_limit": float(options["flatline_run_probability_limit"])}


def budget_limits(ctx: BudgetContext, options: dict[str, Any]) -> dict[str, Any]:
    """The limit is p_r itself; the training readings' quantization step and repeat habits are stored too."""
    return {"run_probability_limit": ctx.rate * ctx.shares["flatline"], **training_facts(ctx.values)}


def training_facts(values: Any) -> dict[str, Any]:
    """What the flatline section stores of the training readings: their resolution and repeat habits.

    ``habits`` is the JSON form of :class:`~.repeat_habits.RepeatHabits`
    (its own format version); limits stored before it existed lack the key
    and build a rule without habits. Empty when ``values`` is None.
    """
    if values is None:
        return {}
    import numpy as np

    y = np.asarray(values, dtype=float).ravel()
    return {"resolution": estimate_resolution(y), "habits": learn_repeat_habits(y).to_json()}


def habits_of(section: Any) -> RepeatHabits | None:
    """The repeat habits stored in a flatline section, or None (limits stored before habits were learnt)."""
    stored = section.get("habits") if section is not None else None
    if stored is None:
        return None
    return RepeatHabits.from_json(stored.to_json() if hasattr(stored, "to_json") else dict(stored))


def build(section: Any, ctx: BuildContext) -> FlatlineRule:
    resolution = max(ctx.config.flatline_resolution, float(section.get("resolution", 0.0)))
    return FlatlineRule(ctx.config.flatline_tolerance, resolution, section["run_probability_limit"],
                        habits=habits_of(section))


ENTRY = RuleEntry(
    name="flatline", kind="innovation", build=build,
    lifecycle=LifecycleConfig(1, 1, 1),
    budget_share=0.15,
    limit_keys=(LimitKey("flatline_run_probability_limit", DEFAULT_RUN_PROBABILITY_LIMIT, low=0, low_open=True,
                         high=1, high_open=True, modes=("sigma",)),),
    required=("run_probability_limit",),
    sigma_limits=sigma_limits, budget_limits=budget_limits,
)
