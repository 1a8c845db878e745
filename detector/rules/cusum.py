"""Level shifts and drifts: a two-sided tabular CUSUM on the standardized innovations.

Notes
-----
The tabular CUSUM on z_t with reference value k and decision interval h
(Page 1954; Montgomery, Introduction to Statistical Quality Control, 7th ed.,
2013, section 9.1):

.. math::

    S^+_t = \\max(0,\\; S^+_{t-1} + z_t - k), \\qquad
    S^-_t = \\max(0,\\; S^-_{t-1} - z_t - k)

It signals when S^+_t > h or S^-_t > h and then restarts from the head
start S_0 (0, or h/2 for the fast initial response of Lucas & Crosier 1982).
N^+_t counts the consecutive steps with S^+ > 0; at a signal the shift of
the mean of z is estimated (Montgomery, section 9.1.3) as

.. math::

    \\hat\\delta = k + S^+_t / N^+_t  \\quad\\text{(upward)},\\qquad
    \\hat\\delta = -(k + S^-_t / N^-_t)  \\quad\\text{(downward)}

in units of sqrt(F_t), and the shift began about N steps before the signal.

**Winsorized input.** With ``clip_abs_z`` = c the sums take max(-c, min(c, z_t))
instead of z_t, so that no single reading of a heavy-tailed feed can carry
the sum most of the way to h (a robust CUSUM in the sense of Lucas &
Crosier 1982b, "Robust CUSUM", Communications in Statistics) [from memory].
:mod:`.arl` computes the run lengths of the winsorized chart exactly.
With k = 0.5 and h = 4 the in-control ARL is 168 and the ARL at a shift of
1 is 8.38 (Lucas & Crosier 1982, Table 1).

**Screening of isolated outliers.** A single wild reading (|z| at or above
``screen_abs_z``, normally the spike alarm limit) would push S past h in one
step and be taken for a level shift. Such a reading is *held back*: it
enters the sums only if the next reading deviates in the same direction by
at least ``persist_abs_z``; otherwise it is dropped as a spike (the spike
rule reports it). A real shift thus costs at most one step of delay.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import RuleError
from ..innovation import Innovation
from .arl import cusum_h_for_arl
from .contract import BudgetContext, BuildContext, LimitKey, RuleBase, RuleEntry, check_state
from .lifecycle import Assessment, LifecycleConfig
from .tail_limits import empirical_cusum_h

#: Default reference value k and decision interval h (sigma mode; with
#: k = 0.5, h = 5 the in-control ARL is about 465 [from memory; :func:`.arl.cusum_arl` computes it]).
DEFAULT_K = 0.5
DEFAULT_H = 5.0
#: Default winsorizing bound of z.
DEFAULT_CLIP_ABS_Z = 3.0


def cusum_step(s_hi, s_lo, z, k):
    """One step of both one-sided sums; works on floats and numpy arrays alike.

    Returns
    -------
    s_hi, s_lo
        max(0, S+ + z - k), max(0, S- - z - k)
    """
    return np.maximum(0.0, s_hi + z - k), np.maximum(0.0, s_lo - z - k)


@dataclass(frozen=True, slots=True)
class CusumSignal:
    """A confirmed shift of the mean of z.

    Attributes
    ----------
    direction : int
        +1 upward, -1 downward.
    shift_z : float
        Estimated shift of the mean of z, signed, in units of sqrt(F_t).
    run_steps : int
        N: steps since the sum last left zero (the shift's estimated age).
    statistic : float
        The sum that crossed h.
    run_calls : int
        Calls of :meth:`TabularCusum.update` (missing and held-back readings
        included) from the first reading of the run to the signal.
    """

    direction: int
    shift_z: float
    run_steps: int
    statistic: float
    run_calls: int = 1


class TabularCusum:
    """A two-sided tabular CUSUM, one z at a time.

    Parameters
    ----------
    k : float
        Reference value (>= 0), usually half the shift to detect fastest.
    h : float
        Decision interval (> 0).
    head_start : float
        S+ and S- at the start and after each signal, in [0, h) (Lucas &
        Crosier 1982 use h/2).
    screen_abs_z : float or None
        Hold back single readings with |z| at or above this (see the module
        Notes); None disables screening.
    persist_abs_z : float
        How far (same sign) the next reading must deviate for a held-back
        reading to count.
    clip_abs_z : float or None
        Winsorize z at +-this before adding it (None: no clipping).
    """

    def __init__(self, k: float = DEFAULT_K, h: float = DEFAULT_H, head_start: float = 0.0,
                 screen_abs_z: float | None = None, persist_abs_z: float = 2.0,
                 clip_abs_z: float | None = None) -> None:
        self.k = float(k)
        self.h = float(h)
        self.head_start = float(head_start)
        if not (math.isfinite(self.k) and self.k >= 0):
            raise RuleError(f"cusum k must be a finite number >= 0, got {k!r}")
        if not (math.isfinite(self.h) and self.h > 0):
            raise RuleError(f"cusum h must be a finite number > 0, got {h!r}")
        if not 0 <= self.head_start < self.h:
            raise RuleError(f"cusum head_start must be in [0, h={self.h}), got {head_start!r}")
        if screen_abs_z is not None and not (screen_abs_z > 0):
            raise RuleError(f"cusum screen_abs_z must be > 0 or None, got {screen_abs_z!r}")
        if not persist_abs_z >= 0:
            raise RuleError(f"cusum persist_abs_z must be >= 0, got {persist_abs_z!r}")
        if clip_abs_z is not None and not clip_abs_z > self.k:
            raise RuleError(f"cusum clip_abs_z must be > k={self.k} or None, got {clip_abs_z!r}")
        self.clip_abs_z = None if clip_abs_z is None else float(clip_abs_z)
        self.screen_abs_z = None if screen_abs_z is None else float(screen_abs_z)
        self.persist_abs_z = float(persist_abs_z)
        self._calls = 0
        self._held_call = 0
        self.reset()

    def parameters(self) -> dict[str, Any]:
        return {"k": self.k, "h": self.h, "head_start": self.head_start, "clip_abs_z": self.clip_abs_z,
                "screen_abs_z": self.screen_abs_z, "persist_abs_z": self.persist_abs_z}

    #: Layout version of :meth:`state_dict`.
    STATE_VERSION = 1

    def state_dict(self) -> dict[str, Any]:
        """The sums, run counters, call count and any held-back reading, as plain JSON values."""
        return {"v": self.STATE_VERSION, "calls": self._calls, "s_hi": self._s_hi, "s_lo": self._s_lo,
                "n_hi": self._n_hi, "n_lo": self._n_lo, "start_hi": self._start_hi, "start_lo": self._start_lo,
                "held": self._held, "held_call": self._held_call}

    def load_state(self, state: Any) -> None:
        """Take back a :meth:`state_dict` of a chart with the same settings."""
        state = check_state(state, "rule 'cusum' chart", self.STATE_VERSION)
        self._calls = int(state["calls"])
        self._s_hi, self._s_lo = float(state["s_hi"]), float(state["s_lo"])
        self._n_hi, self._n_lo = int(state["n_hi"]), int(state["n_lo"])
        self._start_hi, self._start_lo = int(state["start_hi"]), int(state["start_lo"])
        self._held = None if state["held"] is None else float(state["held"])
        self._held_call = int(state["held_call"])

    @property
    def s_hi(self) -> float:
        return self._s_hi

    @property
    def s_lo(self) -> float:
        return self._s_lo

    @property
    def statistic(self) -> float:
        """max(S+, S-)."""
        return max(self._s_hi, self._s_lo)

    @property
    def holding(self) -> bool:
        """Whether a screened reading is being held back."""
        return self._held is not None

    def reset(self) -> None:
        """Restart both sums from the head start and drop any held-back reading."""
        self._s_hi = self._s_lo = self.head_start
        self._n_hi = self._n_lo = 0
        self._held = None
        self._start_hi = self._start_lo = self._calls + 1

    def run_state(self) -> tuple[float, float, int, int, int, int, int]:
        """``(S+, S-, N+, N-, start+, start-, calls)``, for a caller that steps the sums itself
        exactly as :meth:`_add` does (the replay's quiet runs); see :meth:`resume`."""
        return (self._s_hi, self._s_lo, self._n_hi, self._n_lo, self._start_hi, self._start_lo, self._calls)

    def resume(self, state: tuple[float, float, int, int, int, int, int]) -> None:
        """Take back a :meth:`run_state` advanced by finite, unscreened z with no signal."""
        if self._held is not None:
            raise RuleError("cusum: a run state cannot be resumed while a reading is held back")
        (self._s_hi, self._s_lo, self._n_hi, self._n_lo, self._start_hi, self._start_lo,
         self._calls) = state

    def _add(self, z: float, call: int) -> None:
        # the scalar form of cusum_step, with the run counters N+ and N-
        c = self.clip_abs_z
        if c is not None:
            z = c if z > c else (-c if z < -c else z)
        if self._s_hi == 0.0:
            self._start_hi = call
        if self._s_lo == 0.0:
            self._start_lo = call
        self._s_hi = max(0.0, self._s_hi + z - self.k)
        self._s_lo = max(0.0, self._s_lo - z - self.k)
        self._n_hi = self._n_hi + 1 if self._s_hi > 0 else 0
        self._n_lo = self._n_lo + 1 if self._s_lo > 0 else 0

    def update(self, z: float) -> CusumSignal | None:
        """Add one z (NaN is skipped but counted in ``run_calls``); return the signal, if any, and restart after it."""
        self._calls += 1
        if not math.isfinite(z):
            return None
        screen = self.screen_abs_z
        held = self._held
        if screen is not None and abs(z) >= screen:
            if held is not None and (held > 0) == (z > 0):
                self._held = None
                self._add(held, self._held_call)
                self._add(z, self._calls)
            else:
                self._held = z
                self._held_call = self._calls
                return None
        else:
            if held is not None:
                self._held = None
                if (held > 0) == (z > 0) and abs(z) >= self.persist_abs_z:
                    self._add(held, self._held_call)
            self._add(z, self._calls)
        return self._check()

    def _check(self) -> CusumSignal | None:
        up = self._s_hi > self.h
        down = self._s_lo > self.h
        if not (up or down):
            return None
        if up and (not down or self._s_hi >= self._s_lo):
            s, n, direction, start = self._s_hi, self._n_hi, 1, self._start_hi
        else:
            s, n, direction, start = self._s_lo, self._n_lo, -1, self._start_lo
        signal = CusumSignal(direction, direction * (self.k + s / max(n, 1)), n, s, self._calls - start + 1)
        self.reset()
        return signal


class CusumRule(RuleBase):
    """The CUSUM as an alarm rule.

    Parameters
    ----------
    cusum : TabularCusum
    clear_fraction : float
        Clear when max(S+, S-) <= clear_fraction * h (the deadband), in [0, 1].

    The CUSUM restarts itself after each signal; a re-anchoring of the
    level does not restart it.
    """

    name = "cusum"

    def __init__(self, cusum: TabularCusum | None = None, clear_fraction: float = 0.5) -> None:
        self.cusum = cusum or TabularCusum()
        if not 0 <= clear_fraction <= 1:
            raise RuleError(f"cusum clear_fraction must be in [0, 1], got {clear_fraction!r}")
        self.clear_fraction = float(clear_fraction)
        self.last_signal: CusumSignal | None = None

    def parameters(self) -> dict[str, Any]:
        return {**self.cusum.parameters(), "clear_fraction": self.clear_fraction}

    def reset(self) -> None:
        """Restart the sums (as after a refit)."""
        self.cusum.reset()

    def skip_slot(self) -> None:
        """Count a slot the rule does not see in the run length, as a missing reading."""
        self.cusum.update(math.nan)

    def status(self) -> dict[str, Any]:
        return {"s_hi": self.cusum.s_hi, "s_lo": self.cusum.s_lo, "h": self.cusum.h}

    def state_dict(self) -> dict[str, Any]:
        """The chart's state; this step's signal is not state (each step sets it anew)."""
        return {"v": self.STATE_VERSION, "chart": self.cusum.state_dict()}

    def load_state(self, state: Any) -> None:
        state = self._check_state(state)
        self.cusum.load_state(state["chart"])
        self.last_signal = None

    def assess(self, innovation: Innovation) -> Assessment | None:
        """Feed one innovation; ``last_signal`` holds this step's signal (or None)."""
        z = innovation.z
        self.last_signal = None
        signal = self.cusum.update(z)
        if not math.isfinite(z):
            return None
        a = abs(z)
        if signal is not None:
            self.last_signal = signal
            way = "up" if signal.direction > 0 else "down"
            shift_reading = signal.shift_z * innovation.std
            detail = (f"level shift {way} confirmed: about {abs(signal.shift_z):.2f} sigma "
                      f"({shift_reading:+.6g} in reading units) over the last {signal.run_steps} readings "
                      f"(CUSUM {signal.statistic:.2f} > h = {self.cusum.h:.3g})")
            return Assessment("alarm", False, a, detail)
        if self.cusum.holding:
            return Assessment(None, False, a)
        return Assessment(None, self.cusum.statistic <= self.clear_fraction * self.cusum.h, a)


# ------------------------------------------------------------ registry entry
def sigma_limits(options: dict[str, Any]) -> dict[str, Any]:
    return {"k": float(options["cusum_k"]), "h": float(options["cusum_h"]), "clip_abs_z": options["cusum_clip_abs_z"]}


def budget_limits(ctx: BudgetContext, options: dict[str, Any]) -> dict[str, Any]:
    """h = max(h_G, h_E) for the rule's share of the budget (see :mod:`.thresholds`)."""
    k, clip = options["cusum_k"], options["cusum_clip_abs_z"]
    rate = ctx.rate * ctx.shares["cusum"]
    h_gauss = cusum_h_for_arl(k, 1.0 / rate, clip=clip)
    h_emp = empirical_cusum_h(ctx.calm, k, rate, h_gauss, seed=ctx.seed, clip_abs_z=clip)
    return {"k": float(k), "h": max(h_gauss, h_emp), "clip_abs_z": clip, "gaussian_h": h_gauss, "empirical_h": h_emp}


def build(section: Any, ctx: BuildContext) -> CusumRule:
    # the CUSUM holds back what the stream does not absorb, until the next reading decides
    return CusumRule(TabularCusum(section["k"], section["h"], section.get("head_start", 0.0),
                                  screen_abs_z=ctx.insulation_abs_z, clip_abs_z=section.get("clip_abs_z")))


ENTRY = RuleEntry(
    name="cusum", kind="innovation", build=build,
    # the monitor holds the episode open while the level condition holds
    # (a drift or a standing shift), so the off-delay only has to ride out
    # a few steps: a return clears within about 10 readings
    lifecycle=LifecycleConfig(1, 1, 4),
    budget_share=0.35,
    limit_keys=(LimitKey("cusum_k", DEFAULT_K, low=0),
                LimitKey("cusum_h", DEFAULT_H, low=0, low_open=True, modes=("sigma",)),
                LimitKey("cusum_clip_abs_z", DEFAULT_CLIP_ABS_Z, low=0, low_open=True, winsorizing=True)),
    required=("k", "h"),
    sigma_limits=sigma_limits, budget_limits=budget_limits,
)
