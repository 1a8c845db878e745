"""Fit one given spec: choose its estimator, and give degenerate windows a stated treatment.

See :func:`.fitting.fit` for the parameters.

Notes
-----
Two kinds of window would otherwise leave a feed without a usable model:

* **constant** (every reading the same): white noise with a constant, its
  variance floored at r^2 / 12, r the resolution read from the value's
  decimals (1 for a whole number, 0.01 for 20.25), and a problem saying so;
* **quantized** (at most ``QUANTIZED_MAX_LEVELS`` distinct values, such as
  integer counts with long repeats): the spec is fitted as usual, with the
  shock variance floored at r^2 / 12, r the smallest step between two
  distinct values. r^2 / 12 is the variance of rounding to a grid of step r
  (the uniform quantization variance; Sheppard's correction, Sheppard 1898,
  "On the calculation of the most probable values of frequency-constants").
"""

from __future__ import annotations

import math
from decimal import Decimal
from typing import Any

import numpy as np

from .fit_diagnostics import FitProblem
from .fitted_model import FittedModel
from .sarimax_estimator import estimate_sarimax
from .spec import ModelSpec
from .white_noise_estimator import WHITE_NOISE, estimate_white_noise

#: A window with at most this many distinct values is treated as quantized.
QUANTIZED_MAX_LEVELS = 10


def decimal_resolution(value: float) -> float:
    """The step of the last decimal written in ``value``: 1 for 20.0, 0.01 for 20.25."""
    if not math.isfinite(value):
        return 1.0
    if value == round(value):
        return 1.0
    return float(10.0 ** Decimal(repr(float(value))).normalize().as_tuple().exponent)


def window_treatment(y: np.ndarray) -> tuple[str, float, tuple[FitProblem, ...]]:
    """(kind, shock-variance floor, problems) of a window: kind is "", "constant" or "quantized"."""
    x = y[np.isfinite(y)]
    levels = np.unique(x)
    if levels.size == 1:
        r = decimal_resolution(float(levels[0]))
        floor = r * r / 12.0
        problem = FitProblem(
            "constant window",
            f"every reading of the training window is {levels[0]:g}",
            f"the feed may be stuck or not yet in service; fitted as white noise with the variance floored at "
            f"r^2/12 = {floor:.3g} (resolution r = {r:g} from the readings' decimals); refit once it moves")
        return ("constant: white noise around the one value, variance floored at r^2/12 "
                f"(r = {r:g})", floor, (problem,))
    if 1 < levels.size <= QUANTIZED_MAX_LEVELS:
        r = float(np.min(np.diff(levels)))
        floor = r * r / 12.0
        return (f"quantized: {levels.size} distinct values, step r = {r:g}; shock variance floored at "
                f"r^2/12 = {floor:.3g}", floor, ())
    return "", 0.0, ()


def fit_spec(y: np.ndarray, spec: ModelSpec, *, calendar: Any = None, timestamps_epoch_s: Any = None,
             selection: Any = None, interval_s: float | None = None) -> FittedModel:
    """Fit one given spec (module Notes for constant and quantized windows)."""
    treatment, floor, problems = window_treatment(y)
    if problems or (spec == WHITE_NOISE and calendar is None):
        return estimate_white_noise(y, selection=selection, interval_s=interval_s, sigma2_floor=floor,
                                    treatment=treatment, extra_problems=problems)
    return estimate_sarimax(y, spec, calendar=calendar, timestamps_epoch_s=timestamps_epoch_s,
                            selection=selection, interval_s=interval_s, sigma2_floor=floor, treatment=treatment)
