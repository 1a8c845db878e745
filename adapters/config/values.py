"""Reading one config table: typed values, unknown keys, messages that name the key.

The config loader (:mod:`.file`) walks the TOML document with a
:class:`TableReader` per table. Each value is converted by a *checker*, a
function that returns the converted value or raises :class:`Bad` with what is
allowed. The reader turns that into one problem line::

    feeds.defaults.train_points = -5: expected an integer >= 50

Problems are collected, not raised one at a time, so ``leadline
check-config`` reports every mistake of a file at once. Unknown keys get a
did-you-mean suggestion from :func:`difflib.get_close_matches`.
"""

from __future__ import annotations

import difflib
import json
import math
from dataclasses import dataclass, field
from datetime import date, datetime, time
from pathlib import Path
from typing import Any, Callable, Iterable

from leadline.detector.durations import parse_duration_s
from leadline.detector.errors import SpecError

MISSING: Any = object()


class Bad(Exception):
    """A value a checker refuses.

    Parameters
    ----------
    expected : str
        What is allowed, as it reads after "expected ".
    hint : str
        An extra sentence, such as a did-you-mean suggestion.
    """

    def __init__(self, expected: str, hint: str = ""):
        super().__init__(expected)
        self.expected = expected
        self.hint = hint


def toml_repr(value: Any, limit: int = 80) -> str:
    """``value`` written as it would appear in TOML (shortened past ``limit``)."""
    text = _toml(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _toml(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if value is None:
        return "none"
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, (int,)):
        return str(value)
    if isinstance(value, (datetime, date, time)):
        return value.isoformat()
    if isinstance(value, list):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    if isinstance(value, dict):
        if not value:
            return "{}"
        return "{ " + ", ".join(f"{_key(k)} = {_toml(v)}" for k, v in value.items()) + " }"
    return repr(value)


def _key(key: str) -> str:
    bare = key.replace("_", "").replace("-", "").isalnum() and key.isascii()
    return key if bare else json.dumps(key, ensure_ascii=False)


def suggestion(word: str, candidates: Iterable[str]) -> str | None:
    """The candidate closest to ``word`` (case ignored), or None when none is close."""
    options = list(candidates)
    lowered = {c.lower(): c for c in options}
    if word.lower() in lowered:
        return lowered[word.lower()]
    close = difflib.get_close_matches(word.lower(), list(lowered), n=1, cutoff=0.6)
    return lowered[close[0]] if close else None


def did_you_mean(word: str, candidates: Iterable[str]) -> str:
    best = suggestion(word, candidates)
    return f"did you mean {json.dumps(best)}?" if best is not None else ""


def join_key(path: str, key: str | int) -> str:
    """``a.b`` + ``c`` -> ``a.b.c``; an int is an array position (from 1): ``a.b[2]``."""
    if isinstance(key, int):
        return f"{path}[{key}]"
    part = _key(key)
    return f"{path}.{part}" if path else part


def choices_text(options: Iterable[str]) -> str:
    quoted = [json.dumps(o) for o in options]
    if len(quoted) <= 2:
        return " or ".join(quoted)
    return ", ".join(quoted[:-1]) + " or " + quoted[-1]


# ----------------------------------------------------------------------------- checkers
Checker = Callable[[Any], Any]


def text(nonempty: bool = True) -> Checker:
    def check(value: Any) -> str:
        if not isinstance(value, str):
            raise Bad("text in quotes")
        if nonempty and not value.strip():
            raise Bad("non-empty text")
        return value

    return check


def integer(low: int | None = None, high: int | None = None) -> Checker:
    def check(value: Any) -> int:
        if isinstance(value, bool) or not isinstance(value, int) or (low is not None and value < low) or (
            high is not None and value > high
        ):
            raise Bad(_range_text("an integer", low, high))
        return value

    return check


def number(low: float | None = None, high: float | None = None, *, low_open: bool = False,
           high_open: bool = False) -> Checker:
    """A finite int or float within the bounds (open or closed)."""

    def check(value: Any) -> float:
        ok = not isinstance(value, bool) and isinstance(value, (int, float)) and math.isfinite(value)
        if ok and low is not None:
            ok = value > low if low_open else value >= low
        if ok and high is not None:
            ok = value < high if high_open else value <= high
        if not ok:
            raise Bad(_range_text("a number", low, high, low_open, high_open))
        return float(value)

    return check


def _num(x: float) -> str:
    return str(int(x)) if float(x).is_integer() and abs(x) < 1e15 else f"{x:g}"


def _range_text(kind: str, low: float | None, high: float | None, low_open: bool = False,
                high_open: bool = False) -> str:
    if low is not None and high is not None:
        if not low_open and not high_open:
            return f"{kind} from {_num(low)} to {_num(high)}"
        return (f"{kind} {'above' if low_open else 'from'} {_num(low)} and "
                f"{'below' if high_open else 'at most'} {_num(high)}")
    if low is not None:
        return f"{kind} {'> ' if low_open else '>= '}{_num(low)}"
    if high is not None:
        return f"{kind} {'< ' if high_open else '<= '}{_num(high)}"
    return f"{'a finite number' if kind == 'a number' else kind}"


def boolean(value: Any) -> bool:
    if not isinstance(value, bool):
        raise Bad("true or false (without quotes)")
    return value


def choice(*options: str) -> Checker:
    def check(value: Any) -> str:
        if isinstance(value, str) and value in options:
            return value
        hint = did_you_mean(value, options) if isinstance(value, str) else ""
        raise Bad(choices_text(options), hint)

    return check


DURATION_EXPECTED = (
    'a duration such as "15min", "8h" or "14d" (a number and one of s, min, h, d, w), or a number of seconds'
)


def duration_s(value: Any) -> float:
    """``"15min"`` or a positive number of seconds -> seconds."""
    if isinstance(value, bool) or not isinstance(value, (str, int, float)):
        raise Bad(DURATION_EXPECTED)
    try:
        seconds = parse_duration_s(value)
    except SpecError as exc:
        raise Bad(DURATION_EXPECTED) from exc
    if not math.isfinite(seconds):
        raise Bad(DURATION_EXPECTED)
    return seconds


def zone_name(value: Any) -> str:
    """An IANA time zone name that :mod:`zoneinfo` knows."""
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError, available_timezones

    expected = 'an IANA time zone name such as "Europe/London" or "UTC"'
    if not isinstance(value, str) or not value.strip():
        raise Bad(expected)
    try:
        ZoneInfo(value)
    except (ZoneInfoNotFoundError, ValueError) as exc:
        raise Bad(expected, did_you_mean(value, available_timezones())) from exc
    return value


def list_of(item: Checker, *, nonempty: bool = False, what: str = "values") -> Checker:
    """A list whose items pass ``item``; the first bad item is named by its position."""

    def check(value: Any) -> list[Any]:
        if not isinstance(value, list):
            raise Bad(f"a list of {what} in [ ]")
        if nonempty and not value:
            raise Bad(f"a non-empty list of {what}")
        out = []
        for i, v in enumerate(value, start=1):
            try:
                out.append(item(v))
            except Bad as exc:
                raise Bad(f"a list of {what}; item {i} ({toml_repr(v)}) is not {exc.expected}", exc.hint) from exc
        return out

    return check


# ----------------------------------------------------------------------------- collecting
@dataclass
class Problems:
    """Problems and warnings found while reading one file."""

    errors: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    def _add(self, lines: list[str], line: str) -> None:
        if line not in lines:  # the same check may run for several layers
            lines.append(line)

    def error(self, path: str, message: str) -> None:
        self._add(self.errors, f"{path}: {message}" if path else message)

    def bad_value(self, path: str, value: Any, expected: str, hint: str = "") -> None:
        line = f"{path} = {toml_repr(value)}: expected {expected}"
        self._add(self.errors, f"{line}; {hint}" if hint else line)

    def warn(self, path: str, message: str) -> None:
        self._add(self.warnings, f"{path}: {message}" if path else message)


class TableReader:
    """Typed access to one TOML table, recording every problem.

    Parameters
    ----------
    problems : Problems
    node : Any
        The table as tomllib returned it (anything else is reported).
    path : str
        Its key path, such as ``sources.mqtt[1]``.
    allowed : iterable of str, optional
        The keys allowed here; others are reported with a suggestion. None:
        any key (the caller checks).
    """

    def __init__(self, problems: Problems, node: Any, path: str, allowed: Iterable[str] | None):
        self.problems = problems
        self.path = path
        self.ok = isinstance(node, dict)
        if not self.ok:
            problems.bad_value(path, node, "a table")
            node = {}
        self.node: dict[str, Any] = node
        self.allowed = None if allowed is None else tuple(allowed)
        if self.allowed is not None:
            for key in node:
                if key not in self.allowed:
                    self.unknown(key)

    def unknown(self, key: str, candidates: Iterable[str] | None = None) -> None:
        options = tuple(self.allowed if candidates is None else candidates)
        hint = did_you_mean(key, options)
        allowed = ", ".join(options)
        self.problems.error(
            join_key(self.path, key), f"unknown key; {hint + ' ' if hint else ''}(allowed here: {allowed})"
        )

    def key(self, key: str | int) -> str:
        return join_key(self.path, key)

    def has(self, key: str) -> bool:
        return key in self.node

    def get(self, key: str, check: Checker, default: Any = None, *, required: bool = False,
            required_hint: str = "") -> Any:
        """The converted value of ``key``; ``default`` when absent or bad."""
        if key not in self.node:
            if required:
                try:
                    check(MISSING)
                except Bad as exc:
                    expected = exc.expected
                else:  # pragma: no cover - every checker refuses MISSING
                    expected = "a value"
                self.problems.error(
                    self.key(key), f"required key is missing; expected {expected}" + (f" ({required_hint})"
                                                                                     if required_hint else "")
                )
            return default
        value = self.node[key]
        try:
            return check(value)
        except Bad as exc:
            self.problems.bad_value(self.key(key), value, exc.expected, exc.hint)
            return default

    def table(self, key: str, allowed: Iterable[str] | None, *, required: bool = False) -> "TableReader | None":
        if key not in self.node:
            if required:
                self.problems.error(self.key(key), "required table is missing")
            return None
        return TableReader(self.problems, self.node[key], self.key(key), allowed)

    def tables(self, key: str, allowed: Iterable[str] | None) -> list["TableReader"]:
        """An array of tables (``[[key]]`` or ``key = [{...}, ...]``), each as a reader."""
        if key not in self.node:
            return []
        value = self.node[key]
        if isinstance(value, dict):
            self.problems.bad_value(
                self.key(key), value, f"an array of tables: write [[{self.key(key)}]] for each entry"
            )
            return []
        if not isinstance(value, list):
            self.problems.bad_value(self.key(key), value, "an array of tables")
            return []
        where = self.key(key)
        return [TableReader(self.problems, item, join_key(where, i), allowed) for i, item in enumerate(value, start=1)]


def relative_to(base_dir: Path, value: str) -> str:
    """``value`` as an absolute path, relative ones taken from ``base_dir``."""
    path = Path(value).expanduser()
    return str(path if path.is_absolute() else (base_dir / path))
