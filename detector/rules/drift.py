"""Drift rule: a slow ramp on a differenced feed, seen from a frozen anchor.

An ARIMA with d >= 1 follows a slow ramp, so its one-step innovations stay
small and the one-step rules (spike, CUSUM on z) barely see it. The drift
rule scores the accumulated h-step forecast error from a frozen anchor,
A_m of :class:`~.horizon_drift.HorizonDrift`, which grows with the horizon
under a ramp while its standard deviation under the model stays 1. It is
built only for a model with differencing (d + D >= 1: ``ModelSpec.order[1]``
and ``ModelSpec.seasonal[1]``); for a stationary model the one-step rules
already see a ramp.

Where the anchor comes from
---------------------------
A rule sees only the step's :class:`~leadline.detector.innovation.Innovation`,
not the stream's state. The rule therefore carries its own copy of the
filter's recursion, driven by the innovations: a'_{t+1} = T a'_t + c_t +
K_t v_t with K_t = T P_t Z' / F_t and P_{t+1} = T P_t T' + R Q R' - K_t F_t
K_t' (a'_{t+1} = T a'_t + c_t and P_{t+1} = T P_t T' + R Q R' for a missing
or insulated reading), started from the steady P. a'_t differs from the
stream's a_t by T^n (a'_0 - a_0), and the frozen forecast of
:class:`~.horizon_drift.HorizonDrift` carries the same difference, so the
h-step error e_h = v_t + Z (a'_t - a'^{(h)}) is exact (module Notes of
:mod:`.horizon_drift`) as long as the stream's P_t is the rule's (both start
steady; a test holds them to 1e-9). Insulated readings (not absorbed) are
left out of the sum, like missing ones.

Re-anchoring: after H readings, after ``level_moved()`` (the forecasts were
re-anchored to a new level), after a refit (a new monitor builds a new rule)
and after a restore (:meth:`DriftRule.load_state`).

Limits
------
Budget mode: the drift takes half of the CUSUM's share of the budget (the
registry's ``splits_share_of``), only for models with differencing. Its
limit c solves "fraction of anchor windows whose max_m |A_m| exceeds c,
divided by H" = its rate r per slot, by :func:`~.horizon_drift.calibrate_limit`
(seeded) when the simulation has at least 100 expected exceedances; for a
smaller rate it is the union (Bonferroni) bound c = Phi^{-1}(1 - r/2),
whose rate is at most r (within a window, P(max |A_m| > c) <= H 2 (1 -
Phi(c))) and which the module's table shows to be conservative.
Sigma mode: the fixed ``drift_abs`` (default 3.15, the calibrated value for
H = 96 at one false alarm per week with 1-minute slots in the table of
:mod:`.horizon_drift`).

Measured (tests/test_rules_drift.py): on ARIMA(0,1,1) with theta -0.5 and
a ramp of 0.15 shock sd per step, at 1e-3 false alarms per slot for every
rule, the drift rule finds the ramp within 200 slots in about 75% of
series, the spike rule in about 27%, and a CUSUM with k = 0.5 in about 75%:
it adds most where the CUSUM's reference value is tuned to larger shifts
than the ramp's settled innovation mean.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
from scipy.stats import norm

from ..errors import RuleError, StateFormatError
from ..innovation import Innovation
from ..statespace import LinearSystem
from .contract import BudgetContext, BuildContext, LimitKey, RuleBase, RuleEntry, check_state
from .horizon_drift import HorizonDrift, calibrate_limit
from .lifecycle import Assessment, LifecycleConfig

#: Default anchor window H (readings).
DEFAULT_HORIZON = 96
#: Default fixed limit on |A| in sigma mode (module docstring).
DEFAULT_DRIFT_ABS = 3.15
#: Clear below this fraction of the limit (common practice: a deadband of a few tenths).
CLEAR_FRACTION = 0.6
#: Simulated anchor windows of the calibration, and the exceedances it needs (common practice for a Monte
#: Carlo quantile: about 100 or more).
CALIBRATION_WINDOWS = 50_000
MIN_EXCEEDANCES = 100


def differencing_order(spec: Any) -> int:
    """d + D of a :class:`~leadline.detector.spec.ModelSpec`."""
    seasonal_d = 0 if spec.seasonal is None else int(spec.seasonal[1])
    return int(spec.order[1]) + seasonal_d


def steady_cov(system: LinearSystem, tol: float = 1e-12, max_iter: int = 100_000) -> np.ndarray:
    """The steady predicted covariance P of the Kalman filter (Riccati recursion iterated to convergence).

    Notes
    -----
    P <- T P T' + R Q R' - T P Z' Z P T' / (Z P Z' + H) (Durbin & Koopman 2012,
    *Time Series Analysis by State Space Methods*, 2nd ed., section 4.3.4).
    """
    Z, T, RQR, H = system.design, system.transition, system.state_cov, system.obs_cov
    P = RQR.copy() + np.eye(system.k_states)
    for _ in range(max_iter):
        PZ = P @ Z
        F = float(Z @ PZ) + H
        new = T @ P @ T.T + RQR - np.outer(T @ PZ, T @ PZ) / F
        new = 0.5 * (new + new.T)
        if np.max(np.abs(new - P)) <= tol * max(1.0, float(np.max(np.abs(P)))):
            return new
        P = new
    return P


def drift_limit(system: LinearSystem, cov: np.ndarray, horizon: int, rate_per_slot: float, seed: int = 0
                ) -> tuple[float, str]:
    """The |A| limit for ``rate_per_slot`` and how it was found ("calibrated" or "bonferroni")."""
    if not 0 < rate_per_slot * horizon < 1:
        raise RuleError(f"drift: rate per slot {rate_per_slot!r} times horizon {horizon} must be in (0, 1)")
    if CALIBRATION_WINDOWS * rate_per_slot * horizon >= MIN_EXCEEDANCES:
        return calibrate_limit(system, cov, horizon, rate_per_slot, windows=CALIBRATION_WINDOWS, seed=seed), \
            "calibrated"
    return float(norm.isf(rate_per_slot / 2.0)), "bonferroni"


def complete_section(section: Mapping[str, Any] | None, spec: Any, system: LinearSystem, seed: int = 0
                     ) -> dict[str, Any] | None:
    """The drift section with the model's matrices (and, in budget mode, its limit); None for d + D = 0.

    ``section`` is what the registry's builders wrote (the horizon, and the
    fixed limit or the rate per slot); the model is known only after the fit.
    """
    if section is None or differencing_order(spec) < 1:
        return None
    out = dict(section)
    horizon = int(out["horizon"])
    P = steady_cov(system)
    if out.get("rate_per_slot") is not None:
        out["limit_abs"], out["limit_method"] = drift_limit(system, P, horizon, float(out["rate_per_slot"]), seed)
    out["differencing"] = differencing_order(spec)
    out["system"] = {k: np.asarray(v, dtype=float).tolist() for k, v in system.to_arrays().items()}
    out["steady_cov"] = P.tolist()
    return out


class DriftRule(RuleBase):
    """|A_m| of :class:`~.horizon_drift.HorizonDrift` against a limit (module docstring).

    Parameters
    ----------
    system : LinearSystem
    cov : ndarray
        The steady predicted covariance P (the anchor's P_s).
    horizon : int
        H, readings per anchor window.
    limit_abs : float
        Raise a warning when |A_m| >= this.
    """

    name = "drift"
    STATE_VERSION = 1

    def __init__(self, system: LinearSystem, cov: np.ndarray, horizon: int, limit_abs: float) -> None:
        if not (math.isfinite(limit_abs) and limit_abs > 0):
            raise RuleError(f"drift limit_abs must be a finite number > 0, got {limit_abs!r}")
        self.system = system
        self.cov = np.asarray(cov, dtype=float)
        self.limit_abs = float(limit_abs)
        self.clear_abs = CLEAR_FRACTION * self.limit_abs
        self.statistic = HorizonDrift(system, int(horizon))
        self._T = system.transition
        self.reset()

    def parameters(self) -> dict[str, Any]:
        return {"horizon": self.statistic.horizon, "limit_abs": self.limit_abs, "clear_abs": self.clear_abs}

    def reset(self) -> None:
        self.statistic.reset()
        self._state = np.zeros(self.system.k_states)
        self._P = self.cov.copy()
        self._step: int | None = None
        self.last = math.nan

    def level_moved(self) -> None:
        self.statistic.request_anchor()

    def assess(self, inn: Innovation) -> Assessment | None:
        if self._step is not None and inn.step != self._step:
            self.statistic.request_anchor()  # a slot the rule did not see: start a new window
        value = inn.value if inn.absorbed else math.nan
        stat = self.statistic.assess(value, self._state, self._P, inn.step, inn.forecast)
        T, Z, P = self._T, self.system.design, self._P
        self._state = T @ self._state + self.system.state_intercept(inn.step)
        P_next = T @ P @ T.T + self.system.state_cov
        if inn.absorbed and math.isfinite(inn.error):
            TPZ = T @ (P @ Z)
            F = float(Z @ P @ Z) + self.system.obs_cov
            self._state = self._state + TPZ * (inn.error / F)
            P_next = P_next - np.outer(TPZ, TPZ) / F
        self._P = 0.5 * (P_next + P_next.T)
        self._step = inn.step + 1
        a = stat.accumulated
        self.last = a
        if not math.isfinite(a):
            return None
        if abs(a) >= self.limit_abs:
            direction = "above" if a > 0 else "below"
            return Assessment("warning", False, abs(a),
                              f"readings drift {direction} the forecast made {stat.h} readings ago: accumulated "
                              f"error {a:.2f} sigma (|A| >= limit {self.limit_abs:.3g})")
        return Assessment(None, abs(a) < self.clear_abs, abs(a))

    def skip_slot(self) -> None:
        self.statistic.request_anchor()
        self._step = None

    def status(self) -> dict[str, Any]:
        return {"accumulated": None if math.isnan(self.last) else self.last, "horizon_readings": self.statistic.h}

    def state_dict(self) -> dict[str, Any]:
        return {"v": self.STATE_VERSION, "statistic": self.statistic.state_dict(), "state": self._state.tolist(),
                "cov": self._P.tolist(), "step": self._step}

    def load_state(self, state: Mapping[str, Any]) -> None:
        """Take the saved state back, then re-anchor at the next reading (a restore starts a new window)."""
        check_state(state, f"rule {self.name!r}", self.STATE_VERSION)
        try:
            self.statistic.load_state(dict(state["statistic"]))
            saved = np.asarray(state["state"], dtype=float)
            if saved.shape != self._state.shape:
                raise StateFormatError(f"drift state: saved state has shape {saved.shape}, "
                                       f"expected {self._state.shape}")
            self._state = saved
            self._P = np.asarray(state["cov"], dtype=float).reshape(self.cov.shape)
            self._step = None if state["step"] is None else int(state["step"])
        except (KeyError, TypeError, ValueError) as exc:
            raise StateFormatError(f"drift state is malformed: {exc!r}") from exc
        self.statistic.request_anchor()


# ------------------------------------------------------------ registry entry
def sigma_limits(options: dict[str, Any]) -> dict[str, Any] | None:
    if options["drift_horizon"] is None:
        return None
    return {"horizon": int(options["drift_horizon"]), "limit_abs": float(options["drift_abs"])}


def budget_limits(ctx: BudgetContext, options: dict[str, Any]) -> dict[str, Any] | None:
    """The horizon and the rate per slot of the drift's share; the limit needs the model (:func:`complete_section`)."""
    if options["drift_horizon"] is None or "drift" not in ctx.shares:
        return None
    return {"horizon": int(options["drift_horizon"]), "rate_per_slot": ctx.rate * ctx.shares["drift"]}


def build(section: Any, ctx: BuildContext) -> DriftRule | None:
    if section is None or "system" not in section or section.get("limit_abs") is None:
        return None  # not configured, or a model without differencing
    system = LinearSystem.from_arrays({k: np.asarray(_plain(v), dtype=float) for k, v in section["system"].items()})
    return DriftRule(system, np.asarray(_plain(section["steady_cov"]), dtype=float), int(section["horizon"]),
                     float(section["limit_abs"]))


def _plain(value: Any) -> Any:
    return [_plain(v) for v in value] if isinstance(value, (list, tuple)) else value


ENTRY = RuleEntry(
    name="drift", kind="innovation", build=build,
    # a window restarts the statistic every H readings: a long off-delay keeps one ramp one episode
    lifecycle=LifecycleConfig(1, 1, DEFAULT_HORIZON),
    splits_share_of="cusum", enabled_by="drift_horizon",
    limit_keys=(LimitKey("drift_horizon", None, low=2, integer=True),
                LimitKey("drift_abs", DEFAULT_DRIFT_ABS, low=0, low_open=True, modes=("sigma",))),
    sigma_limits=sigma_limits, budget_limits=budget_limits,
)


def drift_options(options: dict[str, Any] | None, spec: Any) -> dict[str, Any]:
    """The limits options with the drift switched on for a model with differencing, off otherwise
    (unless the options name a horizon themselves)."""
    out = dict(options or {})
    if differencing_order(spec) >= 1:
        out.setdefault("drift_horizon", DEFAULT_HORIZON)
    else:
        out["drift_horizon"] = None
    return out
