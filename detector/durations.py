"""Durations written as text: ``"15min"``, ``"1d"``, ``"7d"``, ``"8h"``, ``"90s"``."""

from __future__ import annotations

import re

from .errors import SpecError

#: Seconds in a day and in a week (the unit of the false-alarm budget).
DAY_S = 86400.0
WEEK_S = 7 * DAY_S

_UNITS_S = {"s": 1.0, "sec": 1.0, "min": 60.0, "m": 60.0, "h": 3600.0, "d": DAY_S, "w": WEEK_S}
_PATTERN = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([a-z]+)\s*$")


def parse_duration_s(text: str | float | int) -> float:
    """Seconds in a duration such as ``"1d"`` (units: s, min or m, h, d, w).

    A bare number is taken as seconds.

    Raises
    ------
    SpecError
        Naming the text and the units allowed.
    """
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        seconds = float(text)
    else:
        match = _PATTERN.match(str(text).lower())
        if match is None or match.group(2) not in _UNITS_S:
            raise SpecError(f"duration {text!r} is not a number followed by one of s, min, h, d, w (e.g. '15min', '7d')")
        seconds = float(match.group(1)) * _UNITS_S[match.group(2)]
    if seconds <= 0:
        raise SpecError(f"duration {text!r} must be positive")
    return seconds


def human_duration(seconds: float) -> str:
    """A duration as a person reads it: ``"3 d 0 h 17 min"``, ``"2 h 5 min"``, ``"45 s"``.

    Whole minutes from one minute on (seconds are dropped), whole seconds below;
    the largest unit leads and every smaller unit down to minutes is shown.
    """
    s = max(0.0, float(seconds))
    if s < 60:
        return f"{s:.0f} s"
    minutes = int(s // 60)
    days, rest = divmod(minutes, 1440)
    hours, mins = divmod(rest, 60)
    if days:
        return f"{days} d {hours} h {mins} min"
    if hours:
        return f"{hours} h {mins} min"
    return f"{mins} min"
