"""``[shelving]``: how long an operator may shelve a feed at most.

ISA-18.2 shelving is time-limited, so a shelved feed cannot be forgotten:
``max_duration`` (default 7 days, ``"7d"``) bounds ``leadline shelve --for``.
"""

from __future__ import annotations

from dataclasses import dataclass

from .values import TableReader, duration_s

#: The longest shelving without a ``[shelving] max_duration`` (7 days).
DEFAULT_MAX_SHELVE_S = 7 * 86400.0
SHELVING_KEYS = ("max_duration",)


@dataclass(frozen=True)
class ShelvingConfig:
    """``[shelving]``: ``max_duration_s``, the longest a feed may be shelved at once."""

    max_duration_s: float = DEFAULT_MAX_SHELVE_S


def read_shelving(reader: TableReader | None) -> ShelvingConfig:
    if reader is None or not reader.ok:
        return ShelvingConfig()
    return ShelvingConfig(float(reader.get("max_duration", duration_s, DEFAULT_MAX_SHELVE_S)))
