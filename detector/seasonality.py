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

where tau_t is the reading's local clock time in seconds since 1970-01-01
00:00 local (the epoch seconds plus the UTC offset in force at that
instant in the IANA time zone ``timezone``, read with :mod:`zoneinfo`), so
that a "day" starts at local midnight and the daily shape follows the
clock through both daylight-saving changes; P_j the
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
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np

from .durations import parse_duration_s
from .errors import SpecError

DAY_S = 86400.0
WEEK_S = 7 * DAY_S
CYCLE_NAMES = {DAY_S: "daily cycle", WEEK_S: "weekly cycle"}


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
        A fixed local time minus UTC, kept for configs and saved models
        written before time zones; 0 with ``timezone``.
    timezone : str or None
        An IANA time zone such as ``"Europe/London"``; local time follows
        its daylight-saving changes. None: UTC plus ``utc_offset_s``.
    """

    periods: tuple[SeasonalPeriod, ...] = ()
    weekend: bool = False
    holidays: tuple[date, ...] = ()
    utc_offset_s: float = 0.0
    timezone: str | None = None
    _holiday_ordinals: frozenset = field(default=frozenset(), repr=False, compare=False)
    _zone: Any = field(default=None, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "periods", tuple(self.periods))
        if self.timezone is not None:
            object.__setattr__(self, "_zone", zone_info(self.timezone))
            if self.utc_offset_s:
                raise SpecError(f"give a time zone ({self.timezone!r}) or a fixed UTC offset, not both")
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
        return CalendarTerms(periods, self.weekend, self.holidays, self.utc_offset_s, self.timezone)

    def local_epoch_s(self, epoch_s: np.ndarray) -> np.ndarray:
        """Local clock time of each instant, as seconds since 1970-01-01 00:00 local."""
        epoch = np.asarray(epoch_s, dtype=float)
        if self._zone is None:
            return epoch + self.utc_offset_s
        return epoch + utc_offsets_s(epoch, self._zone)

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

    @property
    def description(self) -> str:
        """The terms in words: ``"daily cycle, 3 harmonics; weekly cycle, 1 harmonic; weekend"``."""
        parts = []
        for p in self.periods:
            name = CYCLE_NAMES.get(p.period_s, f"{p.label} cycle")
            k = p.harmonics
            parts.append(name if k is None else f"{name}, {k} harmonic{'s' if k != 1 else ''}")
        if self.weekend:
            parts.append("weekend")
        if self.holidays:
            parts.append("holidays")
        return "; ".join(parts)

    def has_period(self, period_s: float) -> bool:
        return any(p.period_s == period_s for p in self.periods)

    def shortest_period_steps(self, interval_s: float | None) -> int | None:
        """The shortest cycle in slots, for the Ljung-Box lag."""
        if not self.periods or not interval_s:
            return None
        return max(1, int(round(min(p.period_s for p in self.periods) / interval_s)))

    def design(self, epoch_s: np.ndarray) -> np.ndarray:
        """The regressors x_t for slots at ``epoch_s``; shape (n, len(names))."""
        if not self.is_resolved:
            raise SpecError("choose the harmonics before building the design (see fit with calendar terms)")
        tau = self.local_epoch_s(epoch_s)
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
            "timezone": self.timezone,
            "names": self.names if self.is_resolved else None,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "CalendarTerms":
        return cls(
            tuple(SeasonalPeriod(float(s), None if k is None else int(k)) for s, k in data.get("periods", [])),
            bool(data.get("weekend", False)),
            tuple(date.fromisoformat(d) for d in data.get("holidays", [])),
            float(data.get("utc_offset_s", 0.0)),
            data.get("timezone"),
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


def zone_info(name: str) -> ZoneInfo:
    """The IANA time zone ``name``, or a :class:`SpecError` naming what was expected."""
    try:
        return ZoneInfo(str(name))
    except (ZoneInfoNotFoundError, ValueError) as exc:
        raise SpecError(f"time zone {name!r} is not in the IANA tz database; expected a name such as "
                        "'Europe/London' or 'UTC'") from exc


def utc_offsets_s(epoch_s: np.ndarray, zone: ZoneInfo) -> np.ndarray:
    """The UTC offset (local minus UTC, seconds) in force at each instant in ``zone``.

    The offset is read at the start and the end of each distinct whole
    minute (a transition almost always falls on a whole minute of UTC) and
    spread back; in a minute with a transition inside it, each instant is
    read on its own.
    """
    epoch = np.asarray(epoch_s, dtype=float)

    def offset(t: float) -> float:
        return datetime.fromtimestamp(float(t), zone).utcoffset().total_seconds()

    minutes = np.floor(epoch / 60.0)
    unique, inverse = np.unique(minutes, return_inverse=True)
    start = np.array([offset(m * 60.0) for m in unique])
    end = np.array([offset(m * 60.0 + 59.999) for m in unique])
    out = start[inverse].reshape(epoch.shape)
    mixed = (start != end)[inverse].reshape(epoch.shape)
    if mixed.any():
        out[mixed] = [offset(t) for t in epoch[mixed]]
    return out


def utc_epoch_s(stamp: datetime) -> float:
    if stamp.tzinfo is None:
        stamp = stamp.replace(tzinfo=timezone.utc)
    return stamp.timestamp()
