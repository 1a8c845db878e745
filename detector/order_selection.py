"""Choose a feed's ARIMA orders automatically ("auto").

The search follows Hyndman & Khandakar (2008), "Automatic time series
forecasting: the forecast package for R", Journal of Statistical Software
27(3), section 3.2:

1. d: repeated KPSS tests (Kwiatkowski et al. 1992) at the 5% level; difference
   while the test rejects level stationarity, up to d = 2.
2. Start from ARIMA(2,d,2), (0,d,0), (1,d,0) and (0,d,1), with a constant
   (a drift when d = 1) unless d = 2.
3. Step from the best so far: p or q by +-1, both by +-1, and the constant
   toggled; keep the first variation with a lower AICc and repeat until
   none improves.

Candidates that are not stationary or not invertible (a root of the AR or
MA polynomial within 1.001 of the unit circle, the bound used by the same
paper) or that fail to converge are kept in the table but cannot win.
The search is bounded by ``max_p``, ``max_q`` and ``max_fits``.

Notes
-----
AICc = AIC + 2k(k + 1)/(n - k - 1), see :mod:`.fitting`.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from statsmodels.tsa.stattools import kpss

from .errors import FitError, SpecError
from .estimation import fit_spec
from .harmonic_selection import choose_harmonics, screen_cycles
from .spec import ModelSpec
from .white_noise_estimator import WHITE_NOISE

KPSS_ALPHA = 0.05
ROOT_MARGIN = 1.001


@dataclass
class Candidate:
    """One row of the AICc table."""

    spec: ModelSpec
    aicc: float
    status: str  # "ok", "not converged", "near unit root", "failed: ..."
    fitted: Any = field(default=None, repr=False)
    calendar_label: str = ""

    @property
    def label(self) -> str:
        return self.spec.label + (" " + self.calendar_label if self.calendar_label else "")

    def to_dict(self) -> dict[str, Any]:
        return {"model": self.label, "spec": self.spec.to_dict(), "aicc": self.aicc, "status": self.status,
                "calendar": bool(self.calendar_label)}


@dataclass
class OrderSelection:
    """What the search tried and why the chosen model won."""

    d: int
    kpss: list[dict[str, float]]
    candidates: list[Candidate]
    chosen: ModelSpec
    reason: str
    extra: dict[str, Any] = field(default_factory=dict)
    chosen_label: str = ""

    def to_dict(self) -> dict[str, Any]:
        return {
            "d": self.d,
            "kpss": self.kpss,
            "chosen": self.chosen_label or self.chosen.label,
            "reason": self.reason,
            "candidates": [c.to_dict() for c in sorted(self.candidates, key=_sort_key)],
            **self.extra,
        }

    def table(self) -> str:
        """The AICc table as aligned text, best first."""
        rows = sorted(self.candidates, key=_sort_key)
        width = max(len(c.label) for c in rows)
        lines = [f"{'model':<{width}}  {'AICc':>12}  status"]
        for c in rows:
            lines.append(f"{c.label:<{width}}  {c.aicc:>12.3f}  {c.status}")
        return "\n".join(lines)


def _sort_key(c: Candidate) -> tuple[int, float]:
    return (0 if c.status == "ok" else 1, c.aicc if math.isfinite(c.aicc) else math.inf)


def kpss_pvalue(x: np.ndarray) -> tuple[float, float]:
    """KPSS level-stationarity statistic and p-value (p is clipped to [0.01, 0.1])."""
    with warnings.catch_warnings():
        # statsmodels warns when p falls outside its table and clips it; the
        # clipped value is all the decision needs.
        warnings.simplefilter("ignore")
        stat, p, _, _ = kpss(x, regression="c", nlags="auto")
    return float(stat), float(p)


def choose_d(y: np.ndarray, max_d: int = 2) -> tuple[int, list[dict[str, float]]]:
    """Number of differences by repeated KPSS tests at 5% (Hyndman & Khandakar 2008)."""
    x = y[np.isfinite(y)]
    tests = []
    d = 0
    while d < max_d:
        if x.size < 20:
            break
        stat, p = kpss_pvalue(x)
        tests.append({"d": d, "statistic": stat, "pvalue": p})
        if p >= KPSS_ALPHA:
            break
        d += 1
        x = np.diff(x)
    return d, tests


def _near_unit_root(fitted) -> bool:
    p, _, q = fitted.spec.order
    params = fitted.params
    ar = [params.get(f"ar.L{i}", 0.0) for i in range(1, p + 1)]
    ma = [params.get(f"ma.L{i}", 0.0) for i in range(1, q + 1)]
    for coefs, sign in ((ar, -1.0), (ma, 1.0)):
        if any(coefs):
            poly = np.r_[1.0, sign * np.asarray(coefs)]  # 1 -+ c1 z -+ ...
            roots = np.roots(poly[::-1])
            if roots.size and np.min(np.abs(roots)) < ROOT_MARGIN:
                return True
    return False


def _evaluate(y, spec, tried, fit_kwargs) -> Candidate:
    key = (spec.order, spec.seasonal, spec.trend)
    if key in tried:
        return tried[key]
    try:
        fitted = fit_spec(y, spec, **fit_kwargs)
    except FitError as exc:
        cand = Candidate(spec, math.inf, f"failed: {exc}")
    else:
        if not fitted.converged:
            status = "not converged"
        elif _near_unit_root(fitted):
            status = "near unit root"
        else:
            status = "ok"
        cand = Candidate(spec, fitted.aicc, status, fitted)
    tried[key] = cand
    return cand


def stepwise_search(
    y: np.ndarray,
    d: int,
    *,
    seasonal: tuple[int, int, int, int] | None = None,
    max_p: int = 4,
    max_q: int = 4,
    max_fits: int = 24,
    fit_kwargs: dict[str, Any] | None = None,
    tried: dict | None = None,
) -> dict:
    """The stepwise AICc search for fixed d; returns every candidate fitted."""
    fit_kwargs = fit_kwargs or {}
    tried = {} if tried is None else tried
    seasonal_d = seasonal[1] if seasonal else 0
    allow_constant = d + seasonal_d <= 1

    def make(p, q, constant):
        try:
            return ModelSpec((p, d, q), seasonal, "c" if constant and allow_constant else "n")
        except SpecError:
            return None

    start = [make(2, 2, True), make(0, 0, True), make(1, 0, True), make(0, 1, True)]
    if not allow_constant:
        start = [make(2, 2, False), make(0, 0, False), make(1, 0, False), make(0, 1, False)]
    budget = max_fits
    best = None
    for spec in start:
        if spec is None:
            continue
        cand = _evaluate(y, spec, tried, fit_kwargs)
        budget -= 1
        if cand.status == "ok" and (best is None or cand.aicc < best.aicc):
            best = cand
    if best is None:
        return tried
    improved = True
    while improved and budget > 0:
        improved = False
        p, _, q = best.spec.order
        constant = best.spec.trend != "n"
        moves = [(p + 1, q, constant), (p - 1, q, constant), (p, q + 1, constant), (p, q - 1, constant),
                 (p + 1, q + 1, constant), (p - 1, q - 1, constant), (p + 1, q - 1, constant),
                 (p - 1, q + 1, constant)]
        if allow_constant:
            moves.append((p, q, not constant))
        for np_, nq, nc in moves:
            if not (0 <= np_ <= max_p and 0 <= nq <= max_q) or budget <= 0:
                continue
            spec = make(np_, nq, nc)
            if spec is None:
                continue
            key = (spec.order, spec.seasonal, spec.trend)
            fresh = key not in tried
            cand = _evaluate(y, spec, tried, fit_kwargs)
            budget -= int(fresh)
            if cand.status == "ok" and cand.aicc < best.aicc:
                best = cand
                improved = True
                break
    return tried


def explain(candidates: list[Candidate], chosen: Candidate, preface: str) -> str:
    ok = sorted((c for c in candidates if c.status == "ok"), key=_sort_key)
    runner = next((c for c in ok if c is not chosen), None)
    text = f"{preface}; {chosen.label} has the lowest AICc ({chosen.aicc:.2f}) of {len(candidates)} candidates"
    if runner is not None:
        text += f", {runner.aicc - chosen.aicc:.2f} below the next best, {runner.label}"
    excluded = [c for c in candidates if c.status != "ok"]
    if excluded:
        text += f"; {len(excluded)} excluded (not converged, near a unit root or failed)"
    return text


def _calendar_residual(y: np.ndarray, design: np.ndarray) -> np.ndarray:
    """y less its least-squares fit on the calendar terms (and a constant), for KPSS."""
    ok = np.isfinite(y)
    X = np.column_stack([np.ones(ok.sum()), design[ok]])
    beta, *_ = np.linalg.lstsq(X, y[ok], rcond=None)
    out = np.full_like(y, np.nan)
    out[ok] = y[ok] - X @ beta
    return out


def select_order(y: np.ndarray, *, calendar: Any = None, timestamps_epoch_s: Any = None,
                 seasonal_period: int | None = None, interval_s: float | None = None,
                 timezone: str | None = None, find_cycles: bool = True,
                 max_p: int = 4, max_q: int = 4, max_fits: int = 24):
    """Choose d by KPSS and (p, q, constant) by stepwise AICc; return the winning fit.

    With ``calendar`` the search also chooses between no seasonality and
    calendar terms (their harmonics chosen by AICc first, on an
    ARMA(1,1)). Without one, given the timestamps, it looks for the daily
    and weekly cycles itself (:func:`.harmonic_selection.screen_cycles`,
    in local time of ``timezone``) when the interval is under a day and
    the window holds two cycles, and fits the cycles found with their
    own orders into the same table; with ``find_cycles=False`` it does
    not. With a short ``seasonal_period`` s (<= 24) it also tries
    seasonal differencing, SARIMA(p,d,q)(0,1,1)_s. White noise with a
    constant, in closed form, is always in the table as the fallback.
    Every candidate goes in one AICc table on the same data. Caution:
    models with different differencing have likelihoods of differently
    transformed data, so AICc across them is a guide, as in Hyndman &
    Khandakar (2008), who choose D by a test instead; the table shows the
    margin.

    Returns
    -------
    FittedModel
        With ``selection`` set to an :class:`OrderSelection`.
    """
    epoch = None if timestamps_epoch_s is None else np.asarray(timestamps_epoch_s, dtype=float)
    if epoch is not None and epoch.size > 1:
        interval_s = float(epoch[1] - epoch[0])
    plain = {"interval_s": interval_s}
    finite = y[np.isfinite(y)]
    if finite.size and np.ptp(finite) == 0:
        # A constant window has no orders to choose: the stated treatment of .estimation.
        fitted = fit_spec(y, WHITE_NOISE, **plain)
        candidate = Candidate(WHITE_NOISE, fitted.aicc, "ok")
        selection = OrderSelection(0, [], [candidate], WHITE_NOISE,
                                   "the training window is constant: white noise with a variance floor")
        return replace(fitted, selection=selection)
    d, tests = choose_d(y)
    extra: dict[str, Any] = {}
    looked_for = ""
    found = False
    if calendar is None and find_cycles and epoch is not None and interval_s:
        calendar, screen = screen_cycles(y, epoch, interval_s, timezone)
        found = calendar is not None
        if screen:
            extra["cycle_screen"] = screen
            looked_for = "daily" + (" and weekly" if any(len(r["harmonics"]) > 1 for r in screen) else "")
    # With a cycle found, the plain search stops at its starting models (SEARCH_PLAIN_WITH_CYCLE) and
    # the budget goes to the models with the cycle; the plain twin of their winner is fitted below.
    tried = stepwise_search(y, d, max_p=max_p, max_q=max_q, max_fits=4 if found else max_fits,
                            fit_kwargs=plain)
    _evaluate(y, WHITE_NOISE, tried, plain)
    if calendar is not None:
        if epoch is None:
            raise FitError("calendar terms need the slots' timestamps")
        if not calendar.is_resolved:
            base = ModelSpec((1, 0, 1), trend="c")
            calendar, table = choose_harmonics(y, epoch, base, calendar)
            extra["harmonics_table"] = table
        d_cal, tests_cal = choose_d(_calendar_residual(y, calendar.design(epoch)))
        extra["kpss_after_calendar"] = tests_cal
        kwargs = {"calendar": calendar, "timestamps_epoch_s": epoch}
        with_calendar = stepwise_search(y, d_cal, max_p=min(max_p, 3), max_q=min(max_q, 3), max_fits=12,
                                        fit_kwargs=kwargs, tried={})
        for key, cand in with_calendar.items():
            cand.calendar_label = "+ " + calendar.description
            tried[("calendar",) + key] = cand
        ok_cal = [c for c in with_calendar.values() if c.status == "ok"]
        if found and ok_cal:
            twin = min(ok_cal, key=lambda c: c.aicc).spec
            _evaluate(y, twin, tried, plain)
    if seasonal_period is not None and 2 <= seasonal_period <= 24:
        for order in ((0, max(d - 1, 0), 1), (1, max(d - 1, 0), 0), (1, max(d - 1, 0), 1)):
            spec = ModelSpec(order, (0, 1, 1, seasonal_period), "n")
            _evaluate(y, spec, tried, plain)
    candidates = list(tried.values())
    ok = [c for c in candidates if c.status == "ok"]
    if not ok:
        raise FitError("no candidate model could be fitted: " + "; ".join(f"{c.spec.label}: {c.status}"
                                                                          for c in candidates))
    chosen = min(ok, key=lambda c: c.aicc)
    kpss_text = ", ".join(f"d={t['d']}: p={t['pvalue']:.3f}" for t in tests) or "series too short to test"
    reason = explain(candidates, chosen, f"d = {d} from KPSS at 5% ({kpss_text})")
    if chosen.calendar_label:
        reason += f"; with calendar terms ({calendar.description})"
    elif calendar is not None:
        reason += f"; calendar terms ({calendar.description}) tried, AICc kept none"
    elif looked_for:
        reason += f"; looked for {looked_for} cycles and found none worth a fit"
    selection = OrderSelection(chosen.fitted.spec.order[1], tests, candidates, chosen.spec, reason, extra,
                               chosen.label)
    return _with_selection(chosen.fitted, selection)


def _with_selection(fitted, selection):
    for c in selection.candidates:
        c.fitted = None  # keep the table light; the winner is returned
    return replace(fitted, selection=selection)
