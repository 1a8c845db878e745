"""Fit one given spec: the estimator for it, on the feed's window.

See :func:`.fitting.fit` for the parameters.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .fitted_model import FittedModel
from .sarimax_estimator import estimate_sarimax
from .spec import ModelSpec


def fit_spec(y: np.ndarray, spec: ModelSpec, *, calendar: Any = None, timestamps_epoch_s: Any = None,
             selection: Any = None) -> FittedModel:
    """Fit one given spec; see :func:`.fitting.fit`."""
    return estimate_sarimax(y, spec, calendar=calendar, timestamps_epoch_s=timestamps_epoch_s,
                            selection=selection)
