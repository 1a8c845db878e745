"""Text made safe to show to a person: control characters escaped, spreadsheet formulas defused.

Two jobs, both for *output only*: stored data is never altered.

:func:`safe_text`
    Every character a terminal or log viewer may act on instead of
    printing is written as an escape: C0 controls (U+0000-U+001F, so also
    tab, line feed and carriage return), DEL (U+007F), C1 controls
    (U+0080-U+009F, where U+009B is a one-byte CSI), the bidirectional
    embeddings, overrides and isolates (U+202A-U+202E, U+2066-U+2069,
    U+200E, U+200F, U+061C; the "Trojan Source" characters of Boucher &
    Anderson, 2021), the line and paragraph separators U+2028/U+2029 and the
    byte order mark U+FEFF. ESC (U+001B) becomes ``\\x1b``, so an ANSI
    sequence such as ``ESC [31m`` is shown as ``\\x1b[31m`` and changes no
    colour. Characters up to U+00FF are written ``\\xNN``, others
    ``\\uNNNN``. A backslash is left as it is (readability of paths wins
    over an unambiguous round trip; this is display, not encoding).

:func:`csv_text_cell`
    A CSV text cell that a spreadsheet would evaluate as a formula gets a
    leading single quote: a cell starting with ``=``, ``+``, ``-``, ``@``,
    a tab or a carriage return (OWASP, "CSV Injection"). Apply it to text
    cells only: numeric columns are written by the caller as numbers, so a
    reading of ``-3.5`` stays the number -3.5.
"""

from __future__ import annotations

import re

_UNSAFE = re.compile(
    "[\x00-\x1f\x7f-\x9f\u061c\u200e\u200f\u2028\u2029\u202a-\u202e\u2066-\u2069\ufeff]"
)
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def _escape(match: re.Match[str]) -> str:
    code = ord(match.group())
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"


def safe_text(value: object) -> str:
    """``str(value)`` with control, escape and bidi characters shown escaped (see the module notes)."""
    text = value if isinstance(value, str) else str(value)
    if _UNSAFE.search(text) is None:
        return text
    return _UNSAFE.sub(_escape, text)


def has_unsafe(text: str) -> bool:
    """True when :func:`safe_text` would change ``text``."""
    return _UNSAFE.search(text) is not None


def csv_text_cell(value: str) -> str:
    """A text cell a spreadsheet will not run as a formula (OWASP "CSV Injection").

    A cell that starts with ``=``, ``+``, ``-``, ``@``, a tab or a carriage
    return gets a leading ``'``. Only for text columns: write numeric columns
    as numbers, so that ``-3.5`` stays a number.
    """
    if value and value.startswith(_FORMULA_START):
        return "'" + value
    return value


__all__ = ["csv_text_cell", "has_unsafe", "safe_text"]
