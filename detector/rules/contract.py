"""The written contract of an alarm rule, and what a rule declares to the registry.

A rule
------
Every rule is an object with the methods of :class:`Rule`:

``name``
    The rule's name, as stored in each event (``AlarmEvent.rule``) and used
    in the config (``rules = [...]``, ``lifecycles``). Unique in the
    registry (:mod:`.registry`).
``parameters()``
    Its settings as a JSON-serialisable dict; every event of the rule
    carries them (with the lifecycle's on-delay and off-delay).
``assess(observation)``
    Look at one step and say what the rule sees, as an
    :class:`~.lifecycle.Assessment` (or None: nothing to look at). What a
    step is depends on the rule's *kind* (:data:`KINDS`): an
    :class:`~leadline.detector.innovation.Innovation` for ``"innovation"``
    rules, the raw reading for ``"value"`` rules (checked before the model
    sees it), the clock time for ``"clock"`` rules (which give the
    assessment together with the episode's start, a deterministic instant,
    so that a late tick gives the same event key).
``reset()``
    Forget the running statistics (as after a refit); settings stay.
``skip_slot()``
    A slot went by that the rule does not see (an out-of-range reading is
    kept from the model and from the innovation rules). Most rules ignore
    it; the CUSUM counts it in its run length.
``level_moved()``
    The forecasts were re-anchored to a new level: a rule that holds
    innovations scored against the old level restarts them.
``status()``
    Running statistics for display (JSON-serialisable, may be empty).
``state_dict()`` / ``load_state(state)``
    The running state, and only that, as a dict of plain JSON values
    (numbers, text, booleans, None, lists, dicts with text keys) with the
    version of its layout under ``"v"`` (:data:`STATE_VERSION_KEY`). A rule
    writes its state field by field under names of its own choosing, never
    by ``vars()``: renaming a private attribute does not change the saved
    form. ``load_state`` of a version the rule does not read raises
    :class:`~leadline.detector.errors.StateFormatError` naming the rule
    (:func:`check_state`). Settings are not part of the state: the state is
    loaded into a rule built from the same settings.

A rule's registry entry
-----------------------
:class:`RuleEntry` says everything else the system needs to know about a
rule: its kind, its default lifecycle, its share of the false-alarm budget,
the config keys of its limits (:class:`LimitKey`, with their checks and
defaults: the one place each default is written), how its limits section is
built in ``sigma`` mode and in ``budget`` mode, and its factory. Adding a
rule is one new module defining the rule and its entry, and one line in
:data:`.registry.RULES`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, fields
from datetime import datetime, timezone
from typing import Any, Protocol, runtime_checkable

import numpy as np

from ..errors import RuleError, StateFormatError
from ..events import AlarmEvent
from ..innovation import Innovation

#: Keys of the stored limits that are not rules' sections (no rule may take these names).
RESERVED_KEYS = ("format", "format_version", "mode", "budget", "training")

#: The key of a state dict that holds the version of its layout.
STATE_VERSION_KEY = "v"
#: What a rule looks at per step.
KINDS = ("innovation", "value", "clock")


@runtime_checkable
class Rule(Protocol):
    """One alarm rule on one feed (see the module docstring for the contract)."""

    name: str

    def parameters(self) -> dict[str, Any]:
        """The rule's settings, JSON-serialisable; carried by every event."""

    def assess(self, observation: Any) -> Any:
        """The verdict on one step: an Assessment ((Assessment, start) for a clock rule), or None."""

    def reset(self) -> None:
        """Forget the running statistics."""

    def skip_slot(self) -> None:
        """A slot went by that the rule does not see."""

    def level_moved(self) -> None:
        """The forecasts were re-anchored to a new level."""

    def status(self) -> dict[str, Any]:
        """Running statistics for display."""

    def state_dict(self) -> dict[str, Any]:
        """The running state as plain JSON values, with ``"v"``."""

    def load_state(self, state: Mapping[str, Any]) -> None:
        """Take back a :meth:`state_dict`; StateFormatError for an unknown version."""


class RuleBase:
    """Defaults of the contract for a rule without running state: nothing to reset, skip or save.

    A rule with state overrides :meth:`reset`, :meth:`state_dict` and
    :meth:`load_state` (and sets ``STATE_VERSION``).
    """

    name = ""
    #: Layout version of :meth:`state_dict`.
    STATE_VERSION = 1

    def reset(self) -> None:
        """Forget the running statistics (none here)."""

    def skip_slot(self) -> None:
        """A slot went by that the rule does not see (ignored)."""

    def level_moved(self) -> None:
        """The forecasts were re-anchored (nothing to restart)."""

    def status(self) -> dict[str, Any]:
        """Running statistics for display (none)."""
        return {}

    def state_dict(self) -> dict[str, Any]:
        """The running state: only its version."""
        return {STATE_VERSION_KEY: self.STATE_VERSION}

    def load_state(self, state: Any) -> None:
        """Check the saved version; there is nothing else to take back."""
        self._check_state(state)

    def _check_state(self, state: Any) -> Mapping[str, Any]:
        return check_state(state, f"rule {self.name!r}", self.STATE_VERSION)


def check_state(state: Any, owner: str, version: int) -> Mapping[str, Any]:
    """Check that ``state`` is a state dict of ``version``; return it.

    ``owner`` names whose state it is (``"rule 'cusum'"``).

    Raises
    ------
    StateFormatError
        Naming the owner, the version found and the one this build reads.
    """
    if not isinstance(state, Mapping):
        raise StateFormatError(f"{owner}: saved state must be a dict, got {type(state).__name__}")
    found = state.get(STATE_VERSION_KEY)
    if found != version:
        raise StateFormatError(f"{owner}: saved state version {found!r} is not supported "
                               f"(this build reads version {version})")
    return state


# --------------------------------------------------------- plain value codecs
def time_to_json(when: datetime | None) -> str | None:
    """A timezone-aware datetime as ISO 8601 text (None stays None)."""
    if when is None:
        return None
    if when.tzinfo is None:
        raise StateFormatError("cannot save a naive datetime in a rule's state")
    return when.isoformat()


def time_from_json(text: str | None) -> datetime | None:
    """ISO 8601 text back to a UTC datetime."""
    if text is None:
        return None
    when = datetime.fromisoformat(text)
    if when.tzinfo is None:
        raise StateFormatError(f"saved time {text!r} has no timezone")
    return when.astimezone(timezone.utc)


def innovation_to_json(inn: Innovation | None) -> dict[str, Any] | None:
    if inn is None:
        return None
    out = {f.name: getattr(inn, f.name) for f in fields(inn)}
    out["timestamp"] = time_to_json(inn.timestamp)
    return out


def innovation_from_json(data: Mapping[str, Any] | None) -> Innovation | None:
    if data is None:
        return None
    return Innovation(**{**data, "timestamp": time_from_json(data.get("timestamp"))})


def event_to_json(event: AlarmEvent | None) -> dict[str, Any] | None:
    if event is None:
        return None
    out = {f.name: getattr(event, f.name) for f in fields(event)}
    out["start"] = time_to_json(event.start)
    out["end"] = time_to_json(event.end)
    out["parameters"] = dict(event.parameters)
    return out


def event_from_json(data: Mapping[str, Any] | None) -> AlarmEvent | None:
    if data is None:
        return None
    return AlarmEvent(**{**data, "start": time_from_json(data["start"]), "end": time_from_json(data.get("end")),
                         "parameters": dict(data.get("parameters") or {})})


# ------------------------------------------------------------- registry parts
@dataclass(frozen=True)
class LimitKey:
    """One option of a rule's limits: its name, default and allowed values.

    Parameters
    ----------
    name : str
        The keyword of :func:`~.thresholds.sigma_thresholds` /
        :func:`~.thresholds.budget_thresholds` and the key of the config's
        ``limits`` table.
    default : float, int or None
        The one place the default is written.
    low, high : float or None
        Bounds of the value (``low_open`` / ``high_open``: excluded).
    integer : bool
        An integer >= ``low``.
    modes : tuple of str
        The threshold modes that take the option: ``"sigma"`` (a fixed
        limit), ``"budget"`` (a setting of the budget computation).
    winsorizing : bool
        A bound at which z is clipped (listed after the limits).
    """

    name: str
    default: Any
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    integer: bool = False
    modes: tuple[str, ...] = ("sigma", "budget")
    winsorizing: bool = False



@dataclass
class BudgetContext:
    """What a rule's budget builder is given (see :mod:`.thresholds`).

    Attributes
    ----------
    rate : float
        p, the false-alarm rate per reading of the whole budget.
    shares : dict
        Fraction of p per rule.
    z : ndarray
        The finite training standardized residuals.
    values : ndarray or None
        The training readings.
    confidence : float or None
        Confidence of upper bounds on empirical limits.
    seed : int
        Seed of every resample.
    sections : dict
        The limits sections built so far, in registry order.
    budget : dict
        The stored ``budget`` block (false alarms, period, rate, shares).
    """

    rate: float
    shares: dict[str, float]
    z: Any
    values: Any
    confidence: float | None
    seed: int
    sections: dict[str, Any]
    budget: dict[str, Any]

    @property
    def abs_z(self) -> Any:
        return np.abs(self.z)

    @property
    def calm(self) -> Any:
        """The residuals below the spike alarm limit (what the live rules see unscreened)."""
        return self.z[self.abs_z < self.sections["spike"]["alarm_abs_z"]]


@dataclass
class BuildContext:
    """What a rule's factory is given besides its limits section.

    Attributes
    ----------
    config : MonitorConfig
    screen_abs_z : float or None
        |z| from which a single reading is left to the spike rule (its alarm limit).
    insulation_abs_z : float or None
        |z| from which a reading is not absorbed.
    last_seen : datetime or None
        The last known reading, where a clock rule starts.
    """

    config: Any
    screen_abs_z: float | None = None
    insulation_abs_z: float | None = None
    last_seen: datetime | None = None


@dataclass(frozen=True)
class RuleEntry:
    """Everything the system knows about one rule (see the module docstring).

    Parameters
    ----------
    name : str
    kind : {"innovation", "value", "clock"}
    lifecycle : LifecycleConfig
        Default on-delay and off-delay.
    build : callable
        ``build(section, context) -> Rule or None``: the factory, from the
        rule's limits section (None for a rule without limits) and a
        :class:`BuildContext`; None when the rule is not configured.
    budget_share : float or None
        Default fraction of the false-alarm budget; None: none by default.
    splits_share_of : str or None
        When enabled without a share of its own, the rule takes half of
        this rule's share.
    enabled_by : str or None
        The limit key that switches the rule on (the rule is off while it is None).
    limit_keys : tuple of LimitKey
    required : tuple of str
        Keys its limits section must hold as finite numbers.
    sigma_limits : callable or None
        ``sigma_limits(options) -> section or None`` from its sigma-mode options.
    budget_limits : callable or None
        ``budget_limits(context, options) -> section or None`` (a :class:`BudgetContext`).
        It may add settings worth keeping to ``context.budget`` (the stored
        ``budget`` block).
    """

    name: str
    kind: str
    lifecycle: Any
    build: Callable[..., Any]
    budget_share: float | None = None
    splits_share_of: str | None = None
    enabled_by: str | None = None
    limit_keys: tuple[LimitKey, ...] = ()
    required: tuple[str, ...] = ()
    sigma_limits: Callable[[dict[str, Any]], dict[str, Any] | None] | None = None
    budget_limits: Callable[[BudgetContext, dict[str, Any]], dict[str, Any] | None] | None = None

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise RuleError(f"rule {self.name!r}: kind must be one of {KINDS}, got {self.kind!r}")
        # checked by its fields: the lifecycle module imports this one
        if not all(hasattr(self.lifecycle, key) for key in ("on_delay_k", "on_delay_n", "off_delay_steps")):
            raise RuleError(f"rule {self.name!r}: lifecycle must be a LifecycleConfig")

    @property
    def has_limits(self) -> bool:
        return self.sigma_limits is not None


__all__ = ["BudgetContext", "BuildContext", "LimitKey", "Rule", "RuleBase", "RuleEntry", "check_state"]
