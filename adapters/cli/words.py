"""Words and numbers of the review commands: plurals, values, |z|, rollovers.

One place for how a count, a reading or a standardized innovation is
written, so ``events``, ``status``, ``summary``, ``export`` and the report
agree: ``1 alarm event`` / ``2 alarm events``; a value to the feed's
resolution when it is known, else to 4 significant figures; |z| as a
number with one decimal, capped at ``> 99`` (never ``1.97e+04``).
"""

from __future__ import annotations

import math
from typing import Any

#: |z| above this is written "> 99": the exact size tells an operator nothing more.
ABS_Z_CAP = 99.0


def plural(n: int, word: str, many: str | None = None) -> str:
    """``1 alarm``, ``2 alarms``, ``0 alarms`` (``many`` for irregular plurals)."""
    return f"{n:,} {word if n == 1 else (many or word + 's')}"


def times(n: int) -> str:
    """``1 time``, ``3 times``."""
    return plural(n, "time")


def show_value(x: float | None, resolution: float | None = None) -> str:
    """A reading: to the feed's ``resolution`` when given, else 4 significant figures; ``-`` when absent.

    >>> show_value(12.345678), show_value(0.000123456), show_value(41.25, 0.5), show_value(123456.7)
    ('12.35', '0.0001235', '41.0', '123457')
    """
    if x is None or not math.isfinite(x):
        return "-"
    if resolution is not None and resolution > 0 and math.isfinite(resolution):
        decimals = max(0, -math.floor(math.log10(resolution) + 1e-12))
        return f"{round(x / resolution) * resolution:.{decimals}f}"
    if x == 0:
        return "0"
    if abs(x) >= 1e4:
        return f"{x:.0f}"
    decimals = max(0, 3 - math.floor(math.log10(abs(x))))
    text = f"{x:.{decimals}f}"
    return text.rstrip("0").rstrip(".") if "." in text else text


def show_abs_z(z: float | None) -> str:
    """|z| with one decimal; ``> 99`` above :data:`ABS_Z_CAP`; ``-`` when absent."""
    if z is None or not math.isfinite(z):
        return "> 99" if z is not None and math.isinf(z) else "-"
    z = abs(z)
    return "> 99" if z > ABS_Z_CAP else f"{z:.1f}"


def value_word(counter: bool) -> str:
    """What a feed's scored number is: an ``interval delta`` of a counter, else a ``reading``."""
    return "interval delta" if counter else "reading"


def counter_words(counts: Any) -> str:
    """What a counter feed's register did, in words, from its status counts.

    >>> counter_words({"delta": 190, "rollover": 1, "reset": 0, "meter_resets": 0})
    '190 interval deltas, 1 register rollover (handled, not an alarm), no meter reset'
    """
    if not isinstance(counts, dict):
        return str(counts)
    deltas, rolls = int(counts.get("delta", 0)), int(counts.get("rollover", 0))
    resets = int(counts.get("meter_resets", counts.get("reset", 0)))
    parts = [plural(deltas, "interval delta"), plural(rolls, "register rollover") + (
        " (handled, not an alarm)" if rolls else "")]
    parts.append("no meter reset" if resets == 0 else plural(resets, "meter reset"))
    return ", ".join(parts)
