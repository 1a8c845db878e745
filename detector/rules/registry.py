"""The rule registry: one entry per alarm rule, in the order the monitor runs them.

Each rule's module defines the rule and its :class:`~.contract.RuleEntry`
(name, kind, default lifecycle, budget share, limit keys with checks and
defaults, the builders of its limits in sigma and budget mode, and its
factory). Everything that lists rules reads it from here: the monitor,
:func:`~.thresholds.sigma_thresholds` and :func:`~.thresholds.budget_thresholds`,
the stored limits' checks (:mod:`.limits`), the config's ``limits`` keys and
the review commands' rule names. Adding a rule is a new module and one line
in :data:`RULES`.

The order matters: the innovation rules are assessed in it (so the events
of one step come in it) and the limits sections are written in it.
"""

from __future__ import annotations

from .contract import RESERVED_KEYS, LimitKey, RuleEntry

__all__ = ["LimitKey", "RuleEntry", "RULES", "ENGINE_EVENT_KINDS", "entry", "rule_names", "event_rule_names",
           "limit_keys", "default_lifecycles"]
from . import cusum, drift, ewma, flatline, noise_burst, range_check, spike, stale

#: Every rule, in the order the monitor runs them.
RULES: tuple[RuleEntry, ...] = (
    spike.ENTRY,
    cusum.ENTRY,
    ewma.ENTRY,
    drift.ENTRY,
    noise_burst.ENTRY,
    flatline.ENTRY,
    range_check.ENTRY,
    stale.ENTRY,
)

#: Event kinds the engine emits that are not rules (a counter's meter reset).
ENGINE_EVENT_KINDS = ("meter_reset",)


def entries(rules: tuple[RuleEntry, ...] | None = None) -> tuple[RuleEntry, ...]:
    """The registry (or ``rules``), checked: unique names, none clashing with the limits' own keys."""
    found = RULES if rules is None else rules
    names = [entry.name for entry in found]
    if len(set(names)) != len(names) or set(names) & set(RESERVED_KEYS):
        raise ValueError(f"rule names must be unique and not one of {RESERVED_KEYS}: {names}")
    return found


def entry(name: str) -> RuleEntry:
    """The entry of the rule ``name`` (KeyError naming the known rules)."""
    for item in RULES:
        if item.name == name:
            return item
    raise KeyError(f"no rule named {name!r}; known: {rule_names()}")


def rule_names(kind: str | None = None) -> tuple[str, ...]:
    """The rules' names in registry order (only those of ``kind`` when given)."""
    return tuple(item.name for item in RULES if kind is None or item.kind == kind)


def event_rule_names() -> tuple[str, ...]:
    """Every value ``AlarmEvent.rule`` can take: the rules, then the engine's own event kinds."""
    return rule_names() + ENGINE_EVENT_KINDS


def limit_keys(mode: str | None = None) -> tuple[LimitKey, ...]:
    """The rules' limit options (of ``mode`` when given): the limits in registry order, then the winsorizing bounds."""
    keys = [key for item in RULES for key in item.limit_keys if mode is None or mode in key.modes]
    return tuple([k for k in keys if not k.winsorizing] + [k for k in keys if k.winsorizing])


def default_lifecycles() -> dict:
    """Rule name -> its default :class:`~.lifecycle.LifecycleConfig`."""
    return {item.name: item.lifecycle for item in RULES}


entries()
