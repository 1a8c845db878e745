"""Operator shifts as UTC time windows, for ``leadline events --shift``.

A shift (``night = "18:00-06:00"`` in ``[shifts]``) is a pair of local
wall-clock times in the ``[shifts]`` time zone. Its *occurrence* on a local
date D starts at D + start and ends at D + end, or at D + 1 day + end when
the end is at or before the start. Start and end are converted to UTC
separately, so a night shift over a daylight-saving change lasts 11 or 13
hours of real time, as worked.

Selectors
---------
``current``     the occurrence going on now (of several, the latest started)
``last``        the latest occurrence that has ended
``NAME``        the latest occurrence of shift NAME that has started
``DATE/NAME``   the occurrence of NAME that starts on local date DATE
                (``2026-03-14/night`` runs into the morning of the 15th)

Notes
-----
A wall-clock time that does not exist (in the spring gap) or exists twice
(in the autumn overlap) is resolved as :mod:`zoneinfo` does with
``fold=0``: by the offset in force before the change.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, timedelta, timezone

from leadline.detector.errors import ConfigError

from .file import Shift, ShiftsConfig
from .values import did_you_mean

UTC = timezone.utc
#: Local dates searched on each side of today (a shift lasts at most 24 h).
_SEARCH_DAYS = 3


@dataclass(frozen=True)
class ShiftWindow:
    """One occurrence of a shift.

    Attributes
    ----------
    name : str
    local_date : date
        The local date the shift starts on.
    start, end : datetime
        UTC; events with ``start <= event.start < end`` belong to it.
    timezone : str
    """

    name: str
    local_date: date
    start: datetime
    end: datetime
    timezone: str

    @property
    def label(self) -> str:
        """``night of 2026-03-14``."""
        return f"{self.name} of {self.local_date.isoformat()}"


def occurrence(shifts: ShiftsConfig, shift: Shift, local_date: date) -> ShiftWindow:
    zone = shifts.zone
    start_local = datetime.combine(local_date, shift.start, tzinfo=zone)
    end_date = local_date + timedelta(days=1) if shift.overnight else local_date
    end_local = datetime.combine(end_date, shift.end, tzinfo=zone)
    return ShiftWindow(shift.name, local_date, start_local.astimezone(UTC), end_local.astimezone(UTC),
                       shifts.timezone)


def _occurrences_near(shifts: ShiftsConfig, now: datetime) -> list[ShiftWindow]:
    today = now.astimezone(shifts.zone).date()
    days = [today + timedelta(days=k) for k in range(-_SEARCH_DAYS, _SEARCH_DAYS + 1)]
    return [occurrence(shifts, s, d) for d in days for s in shifts.shifts]


def _table(shifts: ShiftsConfig) -> str:
    return ", ".join(f"{s.name} {s.label}" for s in shifts.shifts) + f" ({shifts.timezone})"


def shift_window(shifts: ShiftsConfig | None, selector: str, now: datetime) -> ShiftWindow:
    """The window named by ``selector`` (see the module docstring) as seen at ``now``.

    Raises
    ------
    ConfigError
        No shifts are configured, the name is unknown, the date is not ISO,
        or no shift is on (``current``) or has ended yet (``last``).
    """
    if shifts is None or not shifts.shifts:
        raise ConfigError("--shift needs a config file with a [shifts] table, such as "
                          'day = "06:00-18:00" and night = "18:00-06:00" (give it with --config FILE)')
    if now.tzinfo is None:
        raise ConfigError("shift_window: now must be timezone-aware")
    text = selector.strip()
    near = _occurrences_near(shifts, now)
    if text == "current":
        on = [w for w in near if w.start <= now < w.end]
        if not on:
            raise ConfigError(f"no shift is on at {now.astimezone(shifts.zone):%Y-%m-%d %H:%M} {shifts.timezone}; "
                              f"shifts: {_table(shifts)}")
        return max(on, key=lambda w: w.start)
    if text == "last":
        ended = [w for w in near if w.end <= now]
        return max(ended, key=lambda w: (w.end, w.start))
    day_text, slash, name = text.rpartition("/")
    if not slash:
        name = text
    shift = shifts.get(name)
    if shift is None:
        names = [s.name for s in shifts.shifts]
        hint = did_you_mean(name, [*names, "last", "current"])
        raise ConfigError(f"--shift {selector!r}: no shift named {name!r}" + (f"; {hint}" if hint else "")
                          + f" (expected last, current, NAME or DATE/NAME; shifts: {_table(shifts)})")
    if not slash:
        started = [w for w in near if w.name == name and w.start <= now]
        return max(started, key=lambda w: w.start)
    try:
        local_date = date.fromisoformat(day_text)
    except ValueError as exc:
        raise ConfigError(f"--shift {selector!r}: {day_text!r} is not a date such as 2026-03-14 "
                          "(expected DATE/NAME, the local date the shift starts on)") from exc
    return occurrence(shifts, shift, local_date)
