"""Calendar terms: daily and weekly cycles as regressors, computed from the clock.

A seasonal ARIMA with s = 96 (15-minute data, daily cycle) has a state of
dimension about 2s and fits for minutes. Dynamic harmonic regression puts
the cycle into Fourier regressors instead and leaves a low-order ARMA for
the rest (Hyndman & Athanasopoulos, Forecasting: Principles and Practice,
3rd ed., section 10.5 "Dynamic harmonic regression"):

.. math::

    y_t = x_t'\\beta + \\eta_t, \\qquad \\eta_t \\sim \\text{ARIMA}(p, d, q)

    x_t = \\big[\\sin(2\\pi k \\tau_t / P_j),\\ \\cos(2\\pi k \\tau_t / P_j)\\big]_{j,\\ k=1..K_j}
          \\ \\cup\\ [\\text{weekend}_t,\\ \\text{holiday}_t]

where tau_t is the reading's time in seconds since the Unix epoch (shifted
by ``utc_offset_s`` so that a "day" starts at local midnight), P_j the
period in seconds and K_j its number of harmonics. Because x_t comes from
the timestamp and not from a step count, gaps, restarts and intervals
that do not divide the period (7-minute data, daily cycle) stay in phase.

The stream subtracts x_t' beta from each new reading (it enters d_t) and
runs the ARMA recursion on the rest; forecasts and errors stay on the
reading's own scale.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import date, datetime, timezone
from typing import Any

import numpy as np

from .durations import parse_duration_s
from .errors import SpecError

DAY_S = 86400.0


@dataclass(frozen=True)
class SeasonalPeriod:
    """One cycle: its length and the number of Fourier harmonics (None = choose by AICc)."""

    period_s: float
    harmonics: int | None = None

    def __post_init__(self) -> None:
        if not self.period_s > 0:
            raise SpecError(f"seasonal period must be positive, got {self.period_s}")
        if self.harmonics is not None:
            if isinstance(self.harmonics, bool) or not isinstance(self.harmonics, int) or self.harmonics < 1:
                raise SpecError(f"harmonics must be a positive integer, got {self.harmonics!r}")

    @classmethod
    def parse(cls, text: str) -> "SeasonalPeriod":
        """``"1d"`` or ``"1d:3"`` (period, optionally with K harmonics)."""
        period, _, k = str(text).partition(":")
        try:
            harmonics = int(k) if k else None
        except ValueError as exc:
            raise SpecError(f"seasonality {text!r}: harmonics after ':' must be an integer") from exc
        return cls(parse_duration_s(period), harmonics)

    @property
    def label(self) -> str:
        if self.period_s % DAY_S == 0:
            return f"{int(self.period_s // DAY_S)}d"
        return f"{self.period_s:g}s"


@dataclass(frozen=True)
class CalendarTerms:
    """The calendar part of a spec: Fourier cycles plus optional day flags.

    Parameters
    ----------
    periods : tuple of SeasonalPeriod
    weekend : bool
        Add a regressor that is 1 on Saturdays and Sundays.
    holidays : tuple of datetime.date
        Add a regressor that is 1 on these dates.
    utc_offset_s : float
        Local time minus UTC, so that days and weekends start at local midnight.
    """

    periods: tuple[SeasonalPeriod, ...] = ()
    weekend: bool = False
    holidays: tuple[date, ...] = ()
    utc_offset_s: float = 0.0
    _holiday_ordinals: frozenset = field(default=frozenset(), repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "periods", tuple(self.periods))
        object.__setattr__(self, "holidays", tuple(sorted(set(self.holidays))))
        if not self.periods and not self.weekend and not self.holidays:
            raise SpecError("calendar terms need at least one period, the weekend flag or holidays")
        object.__setattr__(self, "_holiday_ordinals", frozenset(d.toordinal() for d in self.holidays))

    @property
    def is_resolved(self) -> bool:
        """True when every period has its number of harmonics."""
        return all(p.harmonics is not None for p in self.periods)

    def with_harmonics(self, harmonics: tuple[int, ...]) -> "CalendarTerms":
        periods = tuple(SeasonalPeriod(p.period_s, k) for p, k in zip(self.periods, harmonics))
        return CalendarTerms(periods, self.weekend, self.holidays, self.utc_offset_s)

    @property
    def names(self) -> list[str]:
        """Readable names of the regressors, in column order."""
        out = []
        for p in self.periods:
            for k in range(1, (p.harmonics or 0) + 1):
                out += [f"sin({p.label},{k})", f"cos({p.label},{k})"]
        if self.weekend:
            out.append("weekend")
        if self.holidays:
            out.append("holiday")
        return out

    def shortest_period_steps(self, interval_s: float | None) -> int | None:
        """The shortest cycle in slots, for the Ljung-Box lag."""
        if not self.periods or not interval_s:
            return None
        return max(1, int(round(min(p.period_s for p in self.periods) / interval_s)))

    def design(self, epoch_s: np.ndarray) -> np.ndarray:
        """The regressors x_t for slots at ``epoch_s``; shape (n, len(names))."""
        if not self.is_resolved:
            raise SpecError("choose the harmonics before building the design (see fit with calendar terms)")
        tau = np.asarray(epoch_s, dtype=float) + self.utc_offset_s
        columns = []
        for p in self.periods:
            for k in range(1, p.harmonics + 1):
                angle = (2.0 * math.pi * k / p.period_s) * np.mod(tau, p.period_s)
                columns += [np.sin(angle), np.cos(angle)]
        if self.weekend or self.holidays:
            days = np.floor(tau / DAY_S).astype(np.int64)  # days since 1970-01-01, a Thursday
            if self.weekend:
                weekday = (days + 3) % 7  # Monday = 0
                columns.append((weekday >= 5).astype(float))
            if self.holidays:
                epoch_ordinal = date(1970, 1, 1).toordinal()
                columns.append(np.array([float(int(d) + epoch_ordinal in self._holiday_ordinals) for d in days]))
        return np.column_stack(columns) if columns else np.empty((np.size(tau), 0))

    def regression(self, params: dict[str, float], origin_epoch_s: float, interval_s: float) -> "CalendarRegression":
        """The stream's regression part, with beta read from the fitted params."""
        beta = np.array([params[f"x{i + 1}"] for i in range(len(self.names))])
        return CalendarRegression(self, beta, origin_epoch_s, interval_s)

    def to_dict(self) -> dict[str, Any]:
        return {
            "periods": [[p.period_s, p.harmonics] for p in self.periods],
            "weekend": self.weekend,
            "holidays": [d.isoformat() for d in self.holidays],
            "utc_offset_s": self.utc_offset_s,
            "names": self.names if self.is_resolved else None,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "CalendarTerms":
        return cls(
            tuple(SeasonalPeriod(float(s), None if k is None else int(k)) for s, k in data.get("periods", [])),
            bool(data.get("weekend", False)),
            tuple(date.fromisoformat(d) for d in data.get("holidays", [])),
            float(data.get("utc_offset_s", 0.0)),
        )


class CalendarRegression:
    """x_t' beta for slot t of a stream's grid (see :class:`~.stream.Regression`).

    The stream asks for offsets a block of slots at a time, computed with
    the vectorised :meth:`CalendarTerms.design`, so one step costs a list
    lookup; the values are the same as computing each slot alone.
    """

    def __init__(self, terms: CalendarTerms, beta: np.ndarray, origin_epoch_s: float, interval_s: float):
        self.terms = terms
        self.beta = np.asarray(beta, dtype=float)
        self.origin_epoch_s = float(origin_epoch_s)
        self.interval_s = float(interval_s)

    def slot_epoch_s(self, step: int) -> float:
        return self.origin_epoch_s + step * self.interval_s

    def offsets(self, start: int, count: int) -> np.ndarray:
        """x_t' beta for slots start .. start + count - 1."""
        epoch = self.origin_epoch_s + self.interval_s * np.arange(start, start + count, dtype=float)
        return self.terms.design(epoch) @ self.beta

    def to_dict(self) -> dict[str, Any]:
        return {"kind": "calendar", "terms": self.terms.to_dict(), "beta": self.beta.tolist(),
                "origin_epoch_s": self.origin_epoch_s, "interval_s": self.interval_s}


def regression_from_dict(data: dict[str, Any]) -> CalendarRegression:
    """Rebuild a saved regression part (used by ``Stream.from_bytes``)."""
    if data.get("kind") != "calendar":
        raise SpecError(f"unknown regression kind {data.get('kind')!r} in saved state")
    return CalendarRegression(CalendarTerms.from_dict(data["terms"]), np.array(data["beta"]),
                              data["origin_epoch_s"], data["interval_s"])


def utc_epoch_s(stamp: datetime) -> float:
    if stamp.tzinfo is None:
        stamp = stamp.replace(tzinfo=timezone.utc)
    return stamp.timestamp()
