"""AlarmLimits: the alarm limits of one feed as a frozen, typed object with a versioned JSON form.

The limits are made by :func:`~.thresholds.sigma_thresholds` or
:func:`~.thresholds.budget_thresholds`, stored with each model version and
in each checkpoint (as :meth:`AlarmLimits.to_json`), and read by the
monitor, which hands each rule its own section.

JSON form (format ``"leadline.thresholds"``, ``format_version`` 1)::

    {"format": "leadline.thresholds", "format_version": 1,
     "mode": "sigma" | "budget",
     "budget": {...}, "training": {...},      # budget mode only
     "<rule>": {...} or null, ...}            # one section per rule with limits

Every rule of the registry (:mod:`.registry`) with limits has a section
named after it; the keys its entry lists as ``required`` must be finite
numbers. A rule that can be switched off (EWMA) has ``null`` while off.
This is the layout the earlier plain dicts already had, so stored model
records and checkpoints read as they are.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Any

from ..errors import RuleError
from . import registry
from .contract import RESERVED_KEYS

FORMAT = "leadline.thresholds"
#: Version of the JSON form written by :meth:`AlarmLimits.to_json`.
FORMAT_VERSION = 1
MODES = ("sigma", "budget")



class Section(Mapping):
    """A read-only mapping of plain values (one rule's limits, or the budget block)."""

    __slots__ = ("_data",)

    def __init__(self, data: Mapping[str, Any]) -> None:
        object.__setattr__(self, "_data", {k: _frozen(v) for k, v in data.items()})

    def __getitem__(self, key: str) -> Any:
        return self._data[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self._data)

    def __len__(self) -> int:
        return len(self._data)

    def __setattr__(self, name: str, value: Any) -> None:
        raise AttributeError("alarm limits are read-only")

    def __repr__(self) -> str:
        return f"Section({self._data!r})"

    def __reduce__(self) -> tuple[Any, ...]:
        return (Section, (self.to_json(),))

    def to_json(self) -> dict[str, Any]:
        """A deep, plain copy."""
        return {k: _plain(v) for k, v in self._data.items()}


def _frozen(value: Any) -> Any:
    if isinstance(value, Mapping):
        return Section(value)
    if isinstance(value, list):
        return tuple(_frozen(v) for v in value)
    return value


def _plain(value: Any) -> Any:
    if isinstance(value, Section):
        return value.to_json()
    if isinstance(value, tuple):
        return [_plain(v) for v in value]
    return copy.deepcopy(value)


def _finite(value: Any) -> bool:
    return not isinstance(value, bool) and isinstance(value, (int, float)) and math.isfinite(value)


@dataclass(frozen=True, eq=False)
class AlarmLimits:
    """The alarm limits of one feed.

    Attributes
    ----------
    mode : {"sigma", "budget"}
    sections : Section
        Rule name -> that rule's limits (a read-only mapping) or None.
    budget : Section or None
        The budget (false alarms, period, rate per reading, shares) in budget mode.
    training : Section or None
        Facts of the training residuals in budget mode.

    ``limits["cusum"]`` is the CUSUM's section (None for a rule switched off).
    """

    mode: str
    sections: Section
    budget: Section | None = None
    training: Section | None = None

    def __getitem__(self, rule: str) -> Section | None:
        try:
            return self.sections[rule]
        except KeyError:
            raise KeyError(f"the alarm limits have no section {rule!r}") from None

    def get(self, rule: str, default: Any = None) -> Section | None:
        """The rule's section, or ``default`` when there is none."""
        return self.sections.get(rule, default)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, AlarmLimits) and self.to_json() == other.to_json()

    __hash__ = None  # type: ignore[assignment]

    # ------------------------------------------------------------ JSON form
    def to_json(self) -> dict[str, Any]:
        """The versioned JSON form (module docstring); a new plain dict each call."""
        out: dict[str, Any] = {"format": FORMAT, "format_version": FORMAT_VERSION, "mode": self.mode}
        if self.budget is not None:
            out["budget"] = self.budget.to_json()
        if self.training is not None:
            out["training"] = self.training.to_json()
        for name, section in self.sections.items():
            out[name] = None if section is None else section.to_json()
        return out

    @classmethod
    def from_json(cls, data: Any) -> "AlarmLimits":
        """Read and check the JSON form (as stored with a model or in a checkpoint).

        Raises
        ------
        RuleError
            Naming the key that is missing or has a bad value, or a format
            version this build does not read.
        """
        if not isinstance(data, Mapping):
            raise RuleError(f"thresholds must be a dict, got {type(data).__name__}")
        if data.get("format") != FORMAT:
            raise RuleError(f"thresholds: key 'format' must be {FORMAT!r}, got {data.get('format')!r}")
        if data.get("format_version") != FORMAT_VERSION:
            raise RuleError(f"thresholds: format_version {data.get('format_version')!r} is not supported "
                            f"(this build reads {FORMAT_VERSION})")
        if data.get("mode") not in MODES:
            raise RuleError(f"thresholds: key 'mode' must be 'sigma' or 'budget', got {data.get('mode')!r}")
        for entry in registry.RULES:
            if not entry.has_limits:
                continue
            block = data.get(entry.name)
            if block is None and entry.enabled_by is not None:
                continue
            if not isinstance(block, Mapping):
                raise RuleError(f"thresholds: section {entry.name!r} is missing or not a dict")
            for key in entry.required:
                if not _finite(block.get(key)):
                    raise RuleError(f"thresholds: key '{entry.name}.{key}' must be a finite number, "
                                    f"got {block.get(key)!r}")
        sections = {k: v for k, v in data.items() if k not in RESERVED_KEYS}
        budget, training = data.get("budget"), data.get("training")
        return cls(data["mode"], Section(sections), None if budget is None else Section(budget),
                   None if training is None else Section(training))

    @classmethod
    def of(cls, value: "AlarmLimits | Mapping[str, Any]") -> "AlarmLimits":
        """``value`` itself when it is AlarmLimits, else :meth:`from_json` of it."""
        return value if isinstance(value, AlarmLimits) else cls.from_json(value)

    def __reduce__(self) -> tuple[Any, ...]:
        return (AlarmLimits.from_json, (self.to_json(),))
