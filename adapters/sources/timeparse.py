"""Timestamps of input records, turned into timezone-aware UTC datetimes.

Supported forms (``kind``):

``"iso8601"``
    ISO 8601 text such as ``2024-05-01T06:15:00+02:00`` or ``...Z``
    (:meth:`datetime.fromisoformat`). A time without an offset is read in
    the configured named time zone; without one it is rejected.
``"epoch_s"``, ``"epoch_ms"``
    Seconds or milliseconds since 1970-01-01T00:00Z (POSIX time).
any text containing ``%``
    A :meth:`datetime.strptime` pattern, for example ``"%d.%m.%Y %H:%M"``;
    without ``%z`` the time is read in the configured time zone.

Notes
-----
Local times in a named zone (``zoneinfo``) have two traps at daylight-saving
changes. A time in the spring gap does not exist; it is rejected
(``bad_time``). A time in the autumn overlap occurs twice; the resolver
takes the first occurrence until the local clock steps back inside the
overlap, then the second one (a file written in time order goes through the
overlap once with each offset). A reader that starts inside the second pass
of an overlap cannot tell and takes the first occurrence.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone, tzinfo
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from leadline.detector.errors import ConfigError, RejectError

UTC = timezone.utc
EPOCH = datetime(1970, 1, 1, tzinfo=UTC)
TIME_KINDS = ("iso8601", "epoch_s", "epoch_ms")


def load_zone(name: str | None, key: str = "time_zone") -> tzinfo | None:
    """The named zone ``name`` (IANA name such as ``"Europe/Berlin"``), or None."""
    if name is None:
        return None
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError) as exc:
        raise ConfigError(
            f"{key}: unknown time zone {name!r}; expected an IANA name such as 'Europe/Berlin'"
        ) from exc


def epoch_seconds_to_utc(seconds: float, where: str = "", raw: bytes | None = None) -> datetime:
    """``EPOCH + seconds`` as an aware UTC datetime (microsecond rounding)."""
    try:
        if not math.isfinite(seconds):
            raise OverflowError
        return EPOCH + timedelta(seconds=seconds)
    except (OverflowError, ValueError, TypeError) as exc:
        raise RejectError(
            "bad_time", f"epoch time {seconds!r} s is outside the datetime range", where, raw
        ) from exc


class TimeParser:
    """Parse one timestamp text into UTC.

    Parameters
    ----------
    kind : str
        ``"iso8601"``, ``"epoch_s"``, ``"epoch_ms"`` or a strptime pattern.
    time_zone : str, optional
        IANA zone for times that carry no offset.
    decimal : str
        ``"."`` or ``","``: the decimal mark of epoch numbers.
    """

    def __init__(self, kind: str = "iso8601", time_zone: str | None = None, decimal: str = "."):
        if kind not in TIME_KINDS and "%" not in kind:
            raise ConfigError(
                f"time_format: expected one of {TIME_KINDS} or a strptime pattern with '%', got {kind!r}"
            )
        if decimal not in (".", ","):
            raise ConfigError(f"decimal: expected '.' or ',', got {decimal!r}")
        self.kind = kind
        self.zone = load_zone(time_zone)
        self.zone_name = time_zone
        self._decimal_comma = decimal == ","
        # (naive local time, fold) of the last ambiguous time seen: see the Notes.
        self._last_ambiguous: tuple[datetime, int] | None = None

    def __call__(self, text: str, where: str = "", raw: bytes | None = None) -> tuple[datetime, bool]:
        """Return ``(utc_datetime, cacheable)``.

        ``cacheable`` is False for an ambiguous local time, whose resolution
        depends on the times seen before it.

        Raises
        ------
        RejectError
            ``bad_time`` naming what was expected.
        """
        text = text.strip()
        if not text:
            raise RejectError("bad_time", "empty time; expected " + self.expected(), where, raw)
        kind = self.kind
        if kind == "epoch_s" or kind == "epoch_ms":
            number_text = text.replace(",", ".") if self._decimal_comma else text
            try:
                number = float(number_text)
            except ValueError:
                number = math.nan
            if "_" in number_text or not math.isfinite(number):
                raise RejectError(
                    "bad_time", f"time {text!r}: expected {self.expected()}", where, raw
                )
            return epoch_seconds_to_utc(number / 1000.0 if kind == "epoch_ms" else number, where, raw), True
        try:
            if kind == "iso8601":
                parsed = datetime.fromisoformat(text)
            else:
                parsed = datetime.strptime(text, kind)
        except (ValueError, OverflowError) as exc:
            raise RejectError("bad_time", f"time {text!r}: expected {self.expected()}", where, raw) from exc
        if parsed.tzinfo is not None:
            try:
                return parsed.astimezone(UTC), True
            except (OverflowError, ValueError) as exc:
                raise RejectError("bad_time", f"time {text!r} is outside the datetime range", where, raw) from exc
        if self.zone is None:
            raise RejectError(
                "bad_time",
                f"time {text!r} has no UTC offset; expected {self.expected()} "
                "(or configure time_zone for local times)",
                where,
                raw,
            )
        return self.localize(parsed, text, where, raw)

    def localize(self, naive: datetime, text: str = "", where: str = "", raw: bytes | None = None) -> tuple[datetime, bool]:
        """Resolve a naive local time in the configured zone to UTC (see Notes)."""
        zone = self.zone
        if zone is None:
            raise ConfigError("localize() needs a configured time_zone")
        first = naive.replace(tzinfo=zone, fold=0)
        second = naive.replace(tzinfo=zone, fold=1)
        try:
            first_utc = first.astimezone(UTC)
            if first.utcoffset() == second.utcoffset():
                return first_utc, True
            second_utc = second.astimezone(UTC)
        except (OverflowError, ValueError) as exc:
            raise RejectError("bad_time", f"time {text!r} is outside the datetime range", where, raw) from exc
        if first_utc.astimezone(zone).replace(tzinfo=None) != naive:
            raise RejectError(
                "bad_time",
                f"local time {text!r} does not exist in {self.zone_name} (daylight-saving gap)",
                where,
                raw,
            )
        fold = 0
        last = self._last_ambiguous
        if last is not None and abs(naive - last[0]) < timedelta(hours=3):
            if naive < last[0] or last[1] == 1:
                fold = 1
        self._last_ambiguous = (naive, fold)
        return (second_utc if fold else first_utc), False

    def expected(self) -> str:
        """What a valid time looks like, for reject messages."""
        if self.kind == "iso8601":
            return "an ISO 8601 time with a UTC offset such as 2024-05-01T06:15:00+02:00"
        if self.kind == "epoch_s":
            return "epoch seconds such as 1714536900"
        if self.kind == "epoch_ms":
            return "epoch milliseconds such as 1714536900000"
        return f"a time matching the pattern {self.kind!r}"
