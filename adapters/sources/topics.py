"""Topic patterns: what to subscribe to, and how a topic names a feed.

The syntax is leadline's own. A pattern is an MQTT topic filter
(MQTT 3.1.1 section 4.7, MQTT 5 section 4.7) whose wildcard levels may
carry a name:

=============  ==============================================================
level          meaning
=============  ==============================================================
``text``       a literal level, matched exactly (may not contain ``+``/``#``)
``+name``      exactly one level, captured as ``name``
``+``          exactly one level, not captured
``#name``      the remaining levels (one or more), captured joined by ``/``;
               only as the last level
``#``          the remaining levels, not captured; only as the last level
=============  ==============================================================

A name is a letter or ``_`` followed by letters, digits or ``_``; names are
unique within a pattern. The MQTT subscription filter is the pattern with
the names removed: ``plant/+site/flow/+meter`` subscribes to
``plant/+/flow/+``.

The feed id is built from the captures:

* with a ``feed`` template, by ``str.format``-style substitution of the
  names: ``"{site}.{meter}"`` (every ``{...}`` must be a captured name);
* without a template, the captured values joined by ``/`` in pattern order:
  ``plant/northgate/flow/dm-03`` gives ``northgate/dm-03``;
* with no named level at all, the topic itself.

A topic that matches the filter but has an empty captured level
(``plant//flow/dm-03``) is rejected (``bad_topic``); an empty level has no
meaning as part of a feed id. Every mistake in a pattern is a
:class:`~leadline.detector.errors.ConfigError` naming the pattern, the level
and what was expected.
"""

from __future__ import annotations

import re
import string
from dataclasses import dataclass, field

from leadline.detector.errors import ConfigError, RejectError

_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")
_LITERAL, _ONE, _REST = 0, 1, 2


@dataclass(frozen=True)
class TopicPattern:
    """A validated topic pattern.

    Parameters
    ----------
    pattern : str
        The pattern in the syntax above.
    feed : str, optional
        A feed id template using the captured names.

    Attributes
    ----------
    filter : str
        The MQTT subscription filter.
    names : tuple of str
        The captured names in pattern order.
    """

    pattern: str
    feed: str | None = None
    filter: str = field(init=False)
    names: tuple[str, ...] = field(init=False)
    _levels: tuple[tuple[int, str | None], ...] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        pattern = self.pattern
        if not isinstance(pattern, str) or not pattern:
            raise ConfigError(f"topic pattern {pattern!r}: expected a non-empty text such as 'plant/+site/flow/+meter'")
        if "\0" in pattern:
            raise ConfigError(f"topic pattern {pattern!r}: contains a NUL character")
        if len(pattern.encode("utf-8")) > 65535:
            raise ConfigError(f"topic pattern {pattern[:40]!r}...: longer than MQTT's 65535 bytes")
        parts = pattern.split("/")
        levels: list[tuple[int, str | None]] = []
        filter_parts: list[str] = []
        names: list[str] = []
        for index, part in enumerate(parts, start=1):
            where = f"topic pattern {pattern!r}, level {index} {part!r}"
            if part[:1] in ("+", "#"):
                kind = _ONE if part[0] == "+" else _REST
                name = part[1:] or None
                if kind == _REST and index != len(parts):
                    raise ConfigError(f"{where}: '#' is only allowed as the last level")
                if name is not None:
                    if not _NAME.match(name):
                        raise ConfigError(
                            f"{where}: expected a capture name of letters, digits and '_' "
                            f"after {part[0]!r} (not starting with a digit)"
                        )
                    if name in names:
                        raise ConfigError(f"{where}: the name {name!r} is captured twice")
                    names.append(name)
                levels.append((kind, name))
                filter_parts.append(part[0])
            else:
                if "+" in part or "#" in part:
                    raise ConfigError(
                        f"{where}: '+' and '#' must stand alone at the start of a level, "
                        "as in 'plant/+site/#rest'"
                    )
                levels.append((_LITERAL, part))
                filter_parts.append(part)
        if self.feed is not None:
            self._check_template(self.feed, names)
        object.__setattr__(self, "filter", "/".join(filter_parts))
        object.__setattr__(self, "names", tuple(names))
        object.__setattr__(self, "_levels", tuple(levels))

    def _check_template(self, template: str, names: list[str]) -> None:
        if not isinstance(template, str) or not template:
            raise ConfigError(f"topic pattern {self.pattern!r}: feed template must be a non-empty text")
        try:
            fields = [f for _, f, _, _ in string.Formatter().parse(template) if f is not None]
        except ValueError as exc:
            raise ConfigError(f"topic pattern {self.pattern!r}: feed template {template!r}: {exc}") from exc
        for name in fields:
            if name not in names:
                raise ConfigError(
                    f"topic pattern {self.pattern!r}: feed template {template!r} uses {{{name}}}, "
                    f"expected one of the captured names {names}"
                )

    def captures(self, topic: str) -> dict[str, str] | None:
        """The captured levels of ``topic``, or None when it does not match."""
        levels = self._levels
        parts = topic.split("/")
        rest = levels[-1][0] == _REST
        if rest:
            if len(parts) < len(levels) - 1:
                return None
        elif len(parts) != len(levels):
            return None
        captured: dict[str, str] = {}
        for i, (kind, text) in enumerate(levels):
            if kind == _LITERAL:
                if parts[i] != text:
                    return None
            elif kind == _ONE:
                if text is not None:
                    captured[text] = parts[i]
            else:
                if i >= len(parts):
                    # MQTT's '#' also matches the parent level; a named '#' needs a level.
                    if text is not None:
                        captured[text] = ""
                elif text is not None:
                    captured[text] = "/".join(parts[i:])
        if topic.startswith("$") and levels[0][0] != _LITERAL:
            return None  # wildcards never match $-topics (MQTT 3.1.1 section 4.7.2)
        return captured

    def feed_id(self, topic: str) -> str | None:
        """The feed id of ``topic``; None when the topic does not match.

        Raises
        ------
        RejectError
            ``bad_topic`` when a captured level is empty.
        """
        captured = self.captures(topic)
        if captured is None:
            return None
        for name, value in captured.items():
            if value == "" or "//" in value or value.endswith("/"):
                raise RejectError(
                    "bad_topic",
                    f"topic level {name!r} of pattern {self.pattern!r} is empty; expected a non-empty level",
                    topic,
                )
        if self.feed is not None:
            return self.feed.format(**captured)
        if not self.names:
            if not topic:  # MQTT section 4.7.3: a topic has at least one character
                raise RejectError("bad_topic", "empty topic; expected a topic naming the feed", topic)
            return topic
        return "/".join(captured[name] for name in self.names)
