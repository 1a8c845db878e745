"""Shared helpers for checks against statsmodels, the reference library."""

from __future__ import annotations

import numpy as np
from statsmodels.tsa.statespace.sarimax import SARIMAX


def batch_filter(values, model, exog=None):
    """statsmodels' batch filter over ``values`` with the fitted model's parameters.

    ``tolerance=0`` turns off statsmodels' own steady-state shortcut, so the
    reference is the full Kalman recursion at every step (see
    ``leadline.detector.fitting.fit_sarimax``).
    """
    spec = model.spec
    ref = SARIMAX(values, exog=exog, order=spec.order, seasonal_order=spec.seasonal_order, trend=spec.trend,
                  tolerance=0.0)
    params = np.array([model.params[name] for name in ref.param_names])
    return ref.filter(params)


def max_relative_difference(ours, reference, scale=None) -> float:
    """max |ours - reference| / max(|reference|, scale) over the finite reference entries.

    ``scale`` is the quantity's natural size where the value itself can be
    close to zero: sqrt(F_t) for an innovation v_t, 1 for z_t. Without it a
    v_t of 1e-4 sd, which both filters compute to 1e-14 absolute, would
    count as a large relative difference.
    """
    ours = np.asarray(ours, dtype=float)
    reference = np.asarray(reference, dtype=float)
    finite = np.isfinite(reference)
    if not np.array_equal(np.isfinite(ours), finite):
        raise AssertionError("finite entries differ between ours and the reference")
    floor = np.finfo(float).tiny if scale is None else np.broadcast_to(np.asarray(scale, dtype=float),
                                                                        reference.shape)[finite]
    denominator = np.maximum(np.abs(reference[finite]), floor)
    return float(np.max(np.abs(ours[finite] - reference[finite]) / denominator))
