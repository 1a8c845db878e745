"""Fit a feed's model, and report how well it fits: the dispatcher on top of the estimators.

``fit(values, spec)`` returns a frozen :class:`FittedModel` snapshot; its
:meth:`~FittedModel.stream` continues the model one reading at a time.
``fit(values, "auto")`` chooses the orders first (:mod:`.order_selection`).

Layers, lowest first (no module imports one above it):
:mod:`.fitted_model` (the frozen result and residual checks) ->
:mod:`.sarimax_estimator` (one estimator) -> :mod:`.estimation` (one given
spec) -> :mod:`.harmonic_selection` (K per calendar cycle) ->
:mod:`.order_selection` ("auto") -> this module.

A poor fit is reported, never hidden: optimiser failure, warnings raised
during the fit (captured, not printed), and a Ljung-Box rejection of the
standardized residuals all land in :attr:`FittedModel.problems`.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np

from .errors import DataError, FitError
from .estimation import fit_spec
from .fitted_model import FittedModel, as_series, ljung_box
from .harmonic_selection import choose_harmonics
from .order_selection import select_order
from .sarimax_estimator import fit_sarimax
from .spec import ModelSpec

__all__ = ["FittedModel", "as_series", "fit", "fit_sarimax", "fit_spec", "ljung_box"]


def fit(values: Any, spec: ModelSpec | str, *, calendar: Any = None, timestamps_epoch_s: Any = None,
        seasonal_period: int | None = None, interval_s: float | None = None, timezone: str | None = None,
        find_cycles: bool = True) -> FittedModel:
    """Fit ``spec`` (or choose one with ``"auto"``) to ``values``.

    Parameters
    ----------
    values : array_like, 1-D
        Readings on a regular grid, NaN for missing slots.
    spec : ModelSpec or "auto"
        The model, or "auto" for order selection by AICc.
    calendar : CalendarTerms, optional
        Calendar regressors (seasonality by Fourier terms, day flags).
    timestamps_epoch_s : array_like, optional
        Epoch seconds of the slots; required with ``calendar``. When a
        period's number of harmonics is not given, it is chosen by AICc
        and the table is kept in ``harmonics_table``. With "auto" and no
        calendar, the daily and weekly cycles are looked for
        (:func:`.order_selection.select_order`).
    seasonal_period : int, optional
        With "auto": a short period s (<= 24 slots) for which seasonal
        differencing is also tried.
    interval_s : float, optional
        The grid's interval, when no timestamps are given; it lets the
        residual checks look at the daily lag.
    timezone : str, optional
        IANA time zone of the cycles "auto" finds (default UTC).
    find_cycles : bool
        With "auto": look for daily and weekly cycles (default True).

    Returns
    -------
    FittedModel

    Raises
    ------
    FitError
        Too few readings, or statsmodels failed outright.
    """
    y = as_series(values)
    epoch = None if timestamps_epoch_s is None else np.asarray(timestamps_epoch_s, dtype=float)
    if epoch is not None and epoch.shape != y.shape:
        raise FitError(f"timestamps shape {epoch.shape} does not match values shape {y.shape}")
    if epoch is not None and not np.all(np.isfinite(epoch)):
        bad = int(np.flatnonzero(~np.isfinite(epoch))[0])
        raise DataError(f"timestamps must all be finite epoch seconds; slot {bad} is {epoch[bad]!r}")
    if epoch is not None and epoch.size > 1:
        interval_s = float(epoch[1] - epoch[0])
    if isinstance(spec, str):
        if spec != "auto":
            raise FitError(f"spec must be a ModelSpec or 'auto', got {spec!r}")
        return select_order(y, calendar=calendar, timestamps_epoch_s=epoch, seasonal_period=seasonal_period,
                            interval_s=interval_s, timezone=timezone, find_cycles=find_cycles)
    if calendar is not None and not calendar.is_resolved:
        if epoch is None:
            raise FitError("calendar terms need the slots' timestamps")
        calendar, table = choose_harmonics(y, epoch, spec, calendar)
        fitted = fit_spec(y, spec, calendar=calendar, timestamps_epoch_s=epoch)
        return replace(fitted, harmonics_table=tuple(table))
    return fit_spec(y, spec, calendar=calendar, timestamps_epoch_s=epoch, interval_s=interval_s)
