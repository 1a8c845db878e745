"""MQTT payloads -> values: a plain number, or JSON with configurable paths.

SenML packs are parsed by :mod:`leadline.adapters.sources.senml`, with the
same interface: ``parser.parse(payload, now_s)`` returns a
:class:`ParseResult`, whole-payload problems raise
:class:`~leadline.detector.errors.RejectError`.

Rules shared by every parser
----------------------------
* A payload larger than ``max_bytes`` is rejected (``oversized``) before it
  is decoded.
* The payload must be UTF-8 (``bad_utf8``).
* A value must be a finite number. ``NaN`` and ``Infinity`` are rejected
  (``not_finite``); JSON's non-standard ``NaN``/``Infinity`` literals are
  rejected as ``not_json`` (RFC 8259 section 6 has no such numbers), and so
  is nesting deeper than Python's recursion limit. An integer beyond the
  range of a double (``1`` followed by 400 zeros) is ``not_finite``; one of
  more than 4300 digits is ``not_json`` (Python's integer-string limit).
* A payload without a time gets ``timestamp=None``; the subscriber then uses
  the arrival time and flags the reading (``Reading.timestamp_from_arrival``).

JSON paths
----------
``value_path`` and ``time_path`` are dotted paths into the document:
``"value"``, ``"data.flow"``, ``"readings.0.v"`` (a part of digits indexes a
list). A path may also be given as a list of keys and indexes, for keys that
contain dots. ``null`` at the value path is a missing reading (NaN, counted
as missing); a missing key is rejected (``missing_field``). A value given as
a numeric string (``"12.5"``) is accepted. A time is ISO 8601 text, or a
number read as epoch seconds or milliseconds (``time_format``).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, NamedTuple, Protocol, Sequence

from leadline.adapters.sources.timeparse import TimeParser, epoch_seconds_to_utc
from leadline.detector.errors import ConfigError, RejectError

DEFAULT_MAX_BYTES = 64 * 1024


class ParsedValue(NamedTuple):
    """One value found in a payload.

    ``name`` is the SenML resolved name (None for number and JSON payloads);
    ``timestamp`` is None when the payload carried no time.
    """

    value: float
    timestamp: datetime | None
    name: str | None = None
    unit: str | None = None


class ParseResult(NamedTuple):
    """Values of one payload, plus rejects of single records inside it."""

    values: list[ParsedValue]
    rejects: list[RejectError]


class PayloadParser(Protocol):
    max_bytes: int

    def parse(self, payload: bytes, now_s: float) -> ParseResult:
        """Parse ``payload``; ``now_s`` is the arrival time (epoch seconds)."""


def check_size_and_decode(payload: bytes, max_bytes: int) -> str:
    """``payload`` as text, after the size and UTF-8 checks."""
    if len(payload) > max_bytes:
        raise RejectError(
            "oversized", f"payload of {len(payload)} bytes; expected at most {max_bytes} bytes", raw=payload[:256]
        )
    try:
        return bytes(payload).decode("utf-8")
    except UnicodeDecodeError as exc:
        raise RejectError("bad_utf8", f"payload is not UTF-8 ({exc.reason} at byte {exc.start})", raw=payload) from exc


def _reject_constant(name: str) -> Any:
    raise ValueError(f"non-standard JSON constant {name}")


_DECODER = json.JSONDecoder(parse_constant=_reject_constant)
_MISSING = object()


def load_json(text: str, raw: bytes) -> Any:
    """``json.loads`` with every failure turned into ``not_json``."""
    try:
        return _DECODER.decode(text)
    except (ValueError, RecursionError) as exc:
        raise RejectError("not_json", f"payload is not JSON: {str(exc)[:120]}", raw=raw) from exc


def to_number(value: Any, what: str, raw: bytes | None = None) -> float:
    """A JSON number or numeric string as a finite float."""
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise RejectError("non_numeric", f"{what}: expected a number, got {type(value).__name__}", raw=raw)
    if isinstance(value, str):
        text = value.strip()
        try:
            number = float(text)
        except ValueError as exc:
            raise RejectError("non_numeric", f"{what}: expected a number, got {value[:40]!r}", raw=raw) from exc
        if "_" in text:
            raise RejectError("non_numeric", f"{what}: expected a number, got {value[:40]!r}", raw=raw)
    else:
        try:
            number = float(value)
        except OverflowError as exc:
            raise RejectError("not_finite", f"{what}: number too large for a double", raw=raw) from exc
    if not math.isfinite(number):
        raise RejectError("not_finite", f"{what}: expected a finite number, got {value!r}", raw=raw)
    return number


@dataclass(frozen=True)
class NumberPayload:
    """The payload is one number as text, such as ``12.5``."""

    max_bytes: int = DEFAULT_MAX_BYTES

    def parse(self, payload: bytes, now_s: float) -> ParseResult:
        text = check_size_and_decode(payload, self.max_bytes)
        stripped = text.strip()
        if not stripped:
            raise RejectError("non_numeric", "empty payload; expected a number such as 12.5", raw=payload)
        try:
            number = float(stripped)
        except ValueError as exc:
            raise RejectError(
                "non_numeric", f"payload {stripped[:40]!r}: expected a number such as 12.5", raw=payload
            ) from exc
        if "_" in stripped:
            raise RejectError("non_numeric", f"payload {stripped[:40]!r}: expected a number such as 12.5", raw=payload)
        if not math.isfinite(number):
            raise RejectError("not_finite", f"payload {stripped[:40]!r}: expected a finite number", raw=payload)
        return ParseResult([ParsedValue(number, None)], [])


def parse_path(path: str | Sequence[str | int], key: str) -> tuple[str | int, ...]:
    """A JSON path given as dotted text or a sequence, validated."""
    if isinstance(path, str):
        if not path or any(part == "" for part in path.split(".")):
            raise ConfigError(f"{key}: expected a dotted path such as 'data.flow', got {path!r}")
        return tuple(int(p) if p.isdigit() else p for p in path.split("."))
    parts = tuple(path)
    if not parts or not all(isinstance(p, (str, int)) and not isinstance(p, bool) for p in parts):
        raise ConfigError(f"{key}: expected a non-empty list of keys and indexes, got {path!r}")
    return parts


def _path_text(path: tuple[str | int, ...]) -> str:
    return ".".join(str(p) for p in path)


def lookup(document: Any, path: tuple[str | int, ...], raw: bytes) -> Any:
    """The item at ``path``; RejectError ``missing_field`` when absent."""
    item = document
    for depth, part in enumerate(path):
        if isinstance(part, int) and isinstance(item, list):
            if part >= len(item):
                raise RejectError(
                    "missing_field",
                    f"JSON path {_path_text(path)!r}: list at {_path_text(path[:depth]) or 'top'!r} "
                    f"has {len(item)} items, expected index {part}",
                    raw=raw,
                )
            item = item[part]
        elif isinstance(item, dict):
            key = str(part)
            if key not in item:
                raise RejectError(
                    "missing_field", f"JSON path {_path_text(path)!r}: key {key!r} is missing", raw=raw
                )
            item = item[key]
        else:
            raise RejectError(
                "missing_field",
                f"JSON path {_path_text(path)!r}: expected an object at {_path_text(path[:depth]) or 'top'!r}, "
                f"got {type(item).__name__}",
                raw=raw,
            )
    return item


def _fast_lookup(document: Any, path: tuple[str | int, ...]) -> Any:
    """The item at ``path``, or ``_MISSING`` (then :func:`lookup` explains why)."""
    item = document
    for part in path:
        kind = type(item)
        if kind is dict and type(part) is str:
            item = item.get(part, _MISSING)
            if item is _MISSING:
                return _MISSING
        elif kind is list and type(part) is int and part < len(item):
            item = item[part]
        else:
            return _MISSING
    return item


@dataclass(frozen=True)
class JsonPayload:
    """A JSON document with the value (and optionally the time) at given paths.

    Parameters
    ----------
    value_path : str or sequence
        Where the value is, default ``"value"``.
    time_path : str or sequence, optional
        Where the time is; None: the payload has no time.
    time_format : str
        How a numeric time is read: ``"epoch_s"`` or ``"epoch_ms"``; text times
        are always ISO 8601 (``"iso8601"``, the default, reads numbers as
        epoch seconds).
    time_zone : str, optional
        Zone for ISO times without an offset.
    max_bytes : int
        Size limit.
    """

    value_path: str | Sequence[str | int] = "value"
    time_path: str | Sequence[str | int] | None = None
    time_format: str = "iso8601"
    time_zone: str | None = None
    max_bytes: int = DEFAULT_MAX_BYTES
    _value: tuple[str | int, ...] = field(init=False, repr=False)
    _time: tuple[str | int, ...] | None = field(init=False, repr=False)
    _iso: TimeParser = field(init=False, repr=False)

    def __post_init__(self) -> None:
        if self.time_format not in ("iso8601", "epoch_s", "epoch_ms"):
            raise ConfigError(f"time_format: expected 'iso8601', 'epoch_s' or 'epoch_ms', got {self.time_format!r}")
        object.__setattr__(self, "_value", parse_path(self.value_path, "value_path"))
        object.__setattr__(
            self, "_time", None if self.time_path is None else parse_path(self.time_path, "time_path")
        )
        object.__setattr__(self, "_iso", TimeParser("iso8601", self.time_zone))

    def parse(self, payload: bytes, now_s: float) -> ParseResult:
        text = check_size_and_decode(payload, self.max_bytes)
        document = load_json(text, payload)
        item = _fast_lookup(document, self._value)
        if item is _MISSING:
            item = lookup(document, self._value, payload)
        if item is None:
            value = math.nan
        elif type(item) is float:
            value = item
            if value - value != 0.0:
                value = to_number(item, f"JSON path {_path_text(self._value)!r}", payload)
        elif type(item) is int and -(2**53) <= item <= 2**53:
            value = float(item)
        else:
            value = to_number(item, f"JSON path {_path_text(self._value)!r}", payload)
        timestamp = None
        if self._time is not None:
            item = _fast_lookup(document, self._time)
            if item is _MISSING:
                item = lookup(document, self._time, payload)
            timestamp = self._timestamp(item, payload)
        return ParseResult([ParsedValue(value, timestamp)], [])

    def _timestamp(self, item: Any, raw: bytes) -> datetime:
        if (type(item) is int or type(item) is float) and self.time_format != "epoch_ms":
            return epoch_seconds_to_utc(item, raw=raw)
        what = f"JSON path {_path_text(self._time or ())!r}"
        if isinstance(item, str):
            ts, _ = self._iso(item, raw=raw)
            return ts
        if isinstance(item, bool) or not isinstance(item, (int, float)):
            raise RejectError(
                "bad_time", f"{what}: expected ISO 8601 text or epoch number, got {type(item).__name__}", raw=raw
            )
        try:
            seconds = float(item) / (1000.0 if self.time_format == "epoch_ms" else 1.0)
        except OverflowError as exc:
            raise RejectError("bad_time", f"{what}: number too large for a time", raw=raw) from exc
        return epoch_seconds_to_utc(seconds, raw=raw)
