"""Choose the number of Fourier harmonics K per calendar cycle by AICc.

The calendar terms themselves are in :mod:`.seasonality`; this module
sits beside :mod:`.order_selection` and, like it, fits candidates.
Hyndman & Athanasopoulos, Forecasting: Principles and Practice, 3rd ed.,
section 10.5, choose K by minimising AICc in the same way.
"""

from __future__ import annotations

import math
from typing import Any

from .errors import FitError
from .estimation import fit_spec
from .seasonality import CalendarTerms

#: Harmonics tried per period when K is not given (chosen by AICc).
DEFAULT_HARMONIC_CHOICES = (1, 2, 3, 4, 6)


def choose_harmonics(y, epoch_s, spec, calendar: CalendarTerms, choices=DEFAULT_HARMONIC_CHOICES):
    """Pick K per period by AICc, one period at a time, the others held at their current K.

    Returns
    -------
    (CalendarTerms, list of dict)
        The resolved terms and the table of every (K..., AICc) tried.
    """
    period_s = [p.period_s for p in calendar.periods]
    interval = float(epoch_s[1] - epoch_s[0])
    # K may not exceed half the period in slots (Nyquist), nor the choices.
    limits = [max(1, int(p / interval // 2)) for p in period_s]
    current = [p.harmonics or min(2, lim) for p, lim in zip(calendar.periods, limits)]
    table: list[dict[str, Any]] = []
    tried: dict[tuple[int, ...], float] = {}

    def score(ks: tuple[int, ...]) -> float:
        if ks not in tried:
            try:
                fitted = fit_spec(y, spec, calendar=calendar.with_harmonics(ks), timestamps_epoch_s=epoch_s)
                tried[ks] = fitted.aicc
            except FitError:
                tried[ks] = math.inf
            table.append({"harmonics": list(ks), "aicc": tried[ks]})
        return tried[ks]

    for j, p in enumerate(calendar.periods):
        if p.harmonics is not None:
            continue
        best = None
        for k in choices:
            if k > limits[j]:
                continue
            ks = tuple(current[:j] + [k] + current[j + 1 :])
            value = score(ks)
            if best is None or value < best[0]:
                best = (value, k)
        if best is not None:
            current[j] = best[1]
    return calendar.with_harmonics(tuple(current)), table
