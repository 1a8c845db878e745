"""The settings ``leadline tune`` tries: ``--setting NAME=V1,V2,...`` options, and every combination.

Names and values:

* ``false_alarms_per_week=0.1,0.2,1``: the budget of the limits (budget mode);
* ``rules=-ewma,+ewma``: each value a space-separated list of edits of the
  feed's innovation rules, ``-name`` to drop one, ``+name`` to add one
  (``default`` for none);
* ``on_delay=1,2``: every innovation rule activates when its raise condition
  held in k of the last max(k, n) steps;
* ``off_delay=1,12``: every innovation rule clears after this many steps;
* ``stale_intervals=4,8``: silence, in nominal intervals, before ``stale``.

A combination is applied to each feed's settings from the config; names not
given keep the config's values.
"""

from __future__ import annotations

import dataclasses
import itertools
from dataclasses import dataclass
from typing import Any, Callable, Sequence

from leadline.detector.engine import FeedSettings
from leadline.detector.errors import ConfigError
from leadline.detector.rules import registry
from leadline.detector.rules.lifecycle import LifecycleConfig

__all__ = ["Setting", "parse_settings", "combinations"]


def _positive_float(text: str) -> float:
    value = float(text)
    if not value > 0:
        raise ValueError("not > 0")
    return value


def _whole(text: str) -> int:
    value = int(text)
    if value < 1:
        raise ValueError("not >= 1")
    return value


def _rule_edits(text: str) -> tuple[str, ...]:
    words = tuple(text.split())
    if words == ("default",):
        return ()
    known = registry.rule_names("innovation")
    for word in words:
        if word[:1] not in "+-" or word[1:] not in known:
            raise ValueError(f"expected +rule or -rule with a rule of {', '.join(known)}")
    return words


PARSERS: dict[str, tuple[Callable[[str], Any], str]] = {
    "false_alarms_per_week": (_positive_float, "a number > 0"),
    "rules": (_rule_edits, "edits such as -ewma or +ewma"),
    "on_delay": (_whole, "a whole number >= 1"),
    "off_delay": (_whole, "a whole number >= 1"),
    "stale_intervals": (_positive_float, "a number > 0"),
}


def parse_settings(options: Sequence[str]) -> list[tuple[str, list[tuple[str, Any]]]]:
    """``["name=v1,v2", ...]`` -> ``[(name, [(text, value), ...]), ...]``, refusing unknown names and values."""
    out = []
    seen = set()
    for option in options:
        name, sep, values = option.partition("=")
        name = name.strip()
        if not sep or name not in PARSERS:
            raise ConfigError(f"--setting {option!r}: expected NAME=V1,V2 with NAME one of {', '.join(PARSERS)}")
        if name in seen:
            raise ConfigError(f"--setting {name}: given twice; list its values in one option")
        seen.add(name)
        parse, expected = PARSERS[name]
        parsed = []
        for text in values.split(","):
            text = text.strip()
            try:
                parsed.append((text, parse(text)))
            except ValueError as exc:
                raise ConfigError(f"--setting {name}: {text!r}: expected {expected} ({exc})") from exc
        out.append((name, parsed))
    return out


@dataclass(frozen=True)
class Setting:
    """One combination: its words (``false_alarms_per_week=0.2 rules=-ewma``) and its values."""

    values: tuple[tuple[str, str, Any], ...]

    @property
    def label(self) -> str:
        return " ".join(f"{name}={text}" for name, text, _ in self.values) or "config"

    def apply(self, settings: FeedSettings) -> FeedSettings:
        monitor = settings.monitor
        changes: dict[str, Any] = {}
        for name, _, value in self.values:
            if name == "false_alarms_per_week":
                changes["false_alarms_per_week"] = value
            elif name == "stale_intervals":
                monitor = dataclasses.replace(monitor, stale_intervals=value)
            elif name == "rules":
                rules = list(monitor.rules if monitor.rules is not None else registry.rule_names("innovation"))
                for edit in value:
                    if edit[0] == "-" and edit[1:] in rules:
                        rules.remove(edit[1:])
                    elif edit[0] == "+" and edit[1:] not in rules:
                        rules.append(edit[1:])
                monitor = dataclasses.replace(monitor, rules=tuple(rules))
            elif name in ("on_delay", "off_delay"):
                lifecycles = dict(registry.default_lifecycles())
                lifecycles.update(monitor.lifecycles)
                for rule in registry.rule_names("innovation"):
                    life = lifecycles[rule]
                    if name == "on_delay":
                        life = LifecycleConfig(value, max(value, life.on_delay_n), life.off_delay_steps)
                    else:
                        life = LifecycleConfig(life.on_delay_k, life.on_delay_n, value)
                    lifecycles[rule] = life
                monitor = dataclasses.replace(monitor, lifecycles=lifecycles)
        return dataclasses.replace(settings, monitor=monitor, **changes)


def combinations(parsed: list[tuple[str, list[tuple[str, Any]]]]) -> list[Setting]:
    """Every combination of the parsed values, in the order given (the last name varies fastest)."""
    names = [name for name, _ in parsed]
    return [Setting(tuple((name, text, value) for name, (text, value) in zip(names, combo)))
            for combo in itertools.product(*(values for _, values in parsed))]
