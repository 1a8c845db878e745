"""The alarm lifecycle of one rule on one feed: normal, active, returned to normal.

A rule looks at one step and says two things (an :class:`Assessment`): whether
its *raise* condition holds, and at which severity; and whether its *clear*
condition holds. The two conditions are set at different levels (the clear
level is lower): between them lies the deadband, where the state is held.
:class:`AlarmLifecycle` turns these per-step verdicts into episodes.

States::

    normal --(raise met in k of the last n steps: on-delay)--> active
    active --(clear met for m consecutive steps: off-delay)--> normal

``pending`` (normal, with some raise hits inside the on-delay window) and
``clearing`` (active, inside the off-delay) are reported for display only.

One episode gives exactly one :class:`~leadline.detector.events.AlarmEvent`
identity: it is emitted once at onset (``end`` None) and once more when it
returns to normal, with the same ``(feed_id, rule, start)`` and ``end`` set.
Nothing is emitted in between: a signal that chatters across the raise level
inside one episode cannot produce duplicates.

Notes
-----
The on-delay (k of n), the deadband and the off-delay are the standard means
against nuisance and chattering alarms (ANSI/ISA-18.2-2016, section on alarm
design: deadband, on-delay and off-delay) [from memory; common practice].
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from datetime import datetime
from typing import Any

from ..errors import RuleError
from ..events import AlarmEvent
from ..innovation import Innovation
from .contract import check_state, event_from_json, event_to_json

#: Severities in increasing order.
_RANK = {"warning": 1, "alarm": 2}

NORMAL = "normal"
PENDING = "pending"
ACTIVE = "active"
CLEARING = "clearing"


@dataclass(frozen=True, slots=True)
class Assessment:
    """What a rule saw at one step.

    Attributes
    ----------
    severity : {"warning", "alarm"} or None
        The raise condition holds at this severity; None when it does not.
    clear : bool
        The clear condition holds (the statistic is below the lower, clear
        level). ``severity`` None and ``clear`` False is the deadband.
    abs_z : float
        |z_t| of the step, for the episode's peak (NaN when it does not apply).
    detail : str
        One line a person can read: what the rule saw.
    """

    severity: str | None
    clear: bool
    abs_z: float = math.nan
    detail: str = ""

    def __post_init__(self) -> None:
        if self.severity is not None and self.severity not in _RANK:
            raise RuleError(f"severity must be 'warning', 'alarm' or None, got {self.severity!r}")
        if self.severity is not None and self.clear:
            raise RuleError("an assessment cannot both raise and clear")


@dataclass(frozen=True, slots=True)
class LifecycleConfig:
    """On-delay and off-delay of one rule.

    Parameters
    ----------
    on_delay_k, on_delay_n : int
        Activate when the raise condition held in at least k of the last n
        assessed steps (1 <= k <= n). ``1, 1`` activates at once.
    off_delay_steps : int
        Return to normal once the clear condition held for this many
        consecutive assessed steps (>= 1).
    """

    on_delay_k: int = 1
    on_delay_n: int = 1
    off_delay_steps: int = 1

    def __post_init__(self) -> None:
        for name in ("on_delay_k", "on_delay_n", "off_delay_steps"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise RuleError(f"{name} must be an integer >= 1, got {value!r}")
        if self.on_delay_k > self.on_delay_n:
            raise RuleError(f"on_delay_k ({self.on_delay_k}) must not exceed on_delay_n ({self.on_delay_n})")

    def to_dict(self) -> dict[str, int]:
        return {"on_delay_k": self.on_delay_k, "on_delay_n": self.on_delay_n,
                "off_delay_steps": self.off_delay_steps}


def _nan_if_none(inn: Innovation | None, name: str) -> float:
    return float(getattr(inn, name)) if inn is not None else math.nan


class AlarmLifecycle:
    """The state machine of one rule on one feed.

    Parameters
    ----------
    feed_id : str
    rule : str
        The rule's name, as stored in each event.
    parameters : dict
        The rule's JSON-serialisable parameters; the lifecycle adds its own.
    config : LifecycleConfig
    """

    def __init__(self, feed_id: str, rule: str, parameters: dict[str, Any] | None = None,
                 config: LifecycleConfig | None = None) -> None:
        self.feed_id = feed_id
        self.rule = rule
        self.config = config or LifecycleConfig()
        self.parameters = {**(parameters or {}), **self.config.to_dict()}
        self._window = _OnDelayWindow(self.config.on_delay_n)
        self._event: AlarmEvent | None = None
        self._clear_count = 0

    # ------------------------------------------------------------ properties
    @property
    def state(self) -> str:
        """``normal``, ``pending``, ``active`` or ``clearing``."""
        if self._event is None:
            return PENDING if self._window.hits else NORMAL
        return CLEARING if self._clear_count > 0 else ACTIVE

    @property
    def is_active(self) -> bool:
        """True from onset until the episode returns to normal."""
        return self._event is not None

    @property
    def current(self) -> AlarmEvent | None:
        """The open episode as it stands now (peak and severity so far), or None."""
        return self._event

    def status(self) -> dict[str, Any]:
        """A JSON-serialisable snapshot for display and for the engine's state file."""
        ev = self._event
        return {
            "rule": self.rule,
            "state": self.state,
            "severity": ev.severity if ev else None,
            "start": ev.start.isoformat() if ev else None,
            "peak_abs_z": (ev.peak_abs_z if ev and math.isfinite(ev.peak_abs_z) else None),
            "on_delay_hits": self._window.hits,
            "off_delay_count": self._clear_count,
        }

    #: Layout version of :meth:`state_dict`.
    STATE_VERSION = 1

    def state_dict(self) -> dict[str, Any]:
        """The running state (on-delay window, open episode, off-delay count) as plain JSON values."""
        return {"v": self.STATE_VERSION, "on_delay_window": self._window.to_list(),
                "open_episode": event_to_json(self._event), "off_delay_count": self._clear_count}

    def load_state(self, state: Any) -> None:
        """Take back a :meth:`state_dict` of a lifecycle with the same settings."""
        state = check_state(state, f"lifecycle of rule {self.rule!r}", self.STATE_VERSION)
        self._window = _OnDelayWindow(self.config.on_delay_n, state["on_delay_window"])
        self._event = event_from_json(state["open_episode"])
        self._clear_count = int(state["off_delay_count"])

    # ---------------------------------------------------------------- public
    def step(self, assessment: Assessment | None, when: datetime, innovation: Innovation | None = None,
             model_version: int | None = None) -> list[AlarmEvent]:
        """Advance by one step.

        Parameters
        ----------
        assessment : Assessment or None
            The rule's verdict; None when the rule had nothing to look at
            (a missing reading): the state, the on-delay window and the
            off-delay count are all left as they are.
        when : datetime
            UTC time of the step (the reading's timestamp).
        innovation : Innovation, optional
            The step's innovation, recorded at onset.
        model_version : int or None

        Returns
        -------
        list of AlarmEvent
            Empty, or the onset event, or the cleared event.
        """
        if assessment is None:
            return []
        if when.tzinfo is None:
            raise RuleError(f"rule {self.rule!r} on {self.feed_id!r}: step time must be timezone-aware (UTC)")
        if self._event is None:
            self._window.append(assessment.severity is not None)
            if assessment.severity is not None and self._window.hits >= self.config.on_delay_k:
                return [self._open(assessment, when, innovation, model_version)]
            return []
        self._track(assessment)
        if assessment.clear:
            self._clear_count += 1
            if self._clear_count >= self.config.off_delay_steps:
                return [self.close(when)]
        else:
            self._clear_count = 0
        return []

    def pass_quiet(self, steps: int) -> None:
        """``steps`` steps with assessments of no severity while no episode is open: the same
        state as :meth:`step` called that many times (the on-delay window takes the steps)."""
        if self._event is not None:
            raise RuleError(f"rule {self.rule!r} on {self.feed_id!r}: quiet steps need no open episode")
        self._window.append_clear(steps)

    def close(self, when: datetime, detail: str | None = None) -> AlarmEvent:
        """Return the open episode to normal now and give its cleared event.

        Raises
        ------
        RuleError
            When no episode is open.
        """
        if self._event is None:
            raise RuleError(f"rule {self.rule!r} on {self.feed_id!r}: no open episode to close")
        changes = {} if detail is None else {"detail": detail}
        end = max(when, self._event.start)
        event = self._event.cleared(end, **changes)
        self._event = None
        self._clear_count = 0
        self._window.clear()
        return event

    def revise(self, detail: str) -> None:
        """Replace the open episode's detail (what it shows while open); nothing is emitted.

        Raises
        ------
        RuleError
            When no episode is open.
        """
        if self._event is None:
            raise RuleError(f"rule {self.rule!r} on {self.feed_id!r}: no open episode to revise")
        self._event = replace(self._event, detail=detail)

    def open_now(self, assessment: Assessment, when: datetime, innovation: Innovation | None = None,
                 model_version: int | None = None) -> AlarmEvent | None:
        """Open an episode at once, bypassing the on-delay (clock-driven rules).

        Returns None (and only tracks the peak and severity) when an episode
        is already open.
        """
        if assessment.severity is None:
            raise RuleError("open_now needs an assessment with a severity")
        if self._event is not None:
            self._track(assessment)
            return None
        return self._open(assessment, when, innovation, model_version)

    # ------------------------------------------------------------- internals
    def _open(self, assessment: Assessment, when: datetime, inn: Innovation | None,
              model_version: int | None) -> AlarmEvent:
        self._event = AlarmEvent(
            feed_id=self.feed_id,
            rule=self.rule,
            severity=assessment.severity,
            start=when,
            end=None,
            peak_abs_z=assessment.abs_z,
            value_at_onset=_nan_if_none(inn, "value"),
            forecast_at_onset=_nan_if_none(inn, "forecast"),
            lower_at_onset=_nan_if_none(inn, "lower"),
            upper_at_onset=_nan_if_none(inn, "upper"),
            parameters=dict(self.parameters),
            model_version=model_version,
            detail=assessment.detail,
        )
        self._clear_count = 0
        return self._event

    def _track(self, assessment: Assessment) -> None:
        ev = self._event
        changes: dict[str, Any] = {}
        if math.isfinite(assessment.abs_z) and not (assessment.abs_z <= ev.peak_abs_z):
            changes["peak_abs_z"] = assessment.abs_z
        if assessment.severity is not None and _RANK[assessment.severity] > _RANK[ev.severity]:
            changes["severity"] = assessment.severity
            changes["detail"] = f"{ev.detail}; escalated: {assessment.detail}" if ev.detail else assessment.detail
        if changes:
            self._event = replace(ev, **changes)


class _OnDelayWindow:
    """The last ``n`` assessments (abnormal or not) as the bits of one integer, newest in bit 0.

    The k-of-n on-delay only needs how many of the last n were abnormal;
    an int holds them in a few dozen bytes where a deque takes over 600.
    """

    __slots__ = ("_n", "_bits", "_count")

    def __init__(self, n: int, flags: Any = ()) -> None:
        self._n = int(n)
        self._bits = 0
        self._count = 0
        for flag in list(flags)[-self._n:]:
            self.append(bool(flag))

    def append(self, flag: bool) -> None:
        self._bits = ((self._bits << 1) | int(flag)) & ((1 << self._n) - 1)
        self._count = min(self._count + 1, self._n)

    def append_clear(self, count: int) -> None:
        """``count`` normal assessments in a row (as many ``append(False)``)."""
        if count > 0:
            self._bits = (self._bits << min(count, self._n)) & ((1 << self._n) - 1)
            self._count = min(self._count + count, self._n)

    @property
    def hits(self) -> int:
        return self._bits.bit_count()

    def clear(self) -> None:
        self._bits = 0
        self._count = 0

    def to_list(self) -> list[bool]:
        """The flags kept, oldest first."""
        return [bool((self._bits >> (self._count - 1 - i)) & 1) for i in range(self._count)]
