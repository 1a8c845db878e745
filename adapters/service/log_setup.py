"""Logging of ``leadline run``: levels, text or JSON lines, journald priorities, escaped text.

Every handler gets a formatter that escapes the *message* (the format string
with its arguments applied) through :func:`~leadline.adapters.sinks.safe_text.safe_text`:
a feed id or topic holding ``ESC [31m``, a newline or a bidi override is
logged as ``\\x1b[31m``, ``\\x0a``, ``\\u202e``, so input can neither colour
a terminal nor forge a second log line. Tracebacks are left as they are.

Journald priorities
-------------------
When standard error is the journal (systemd sets ``$JOURNAL_STREAM`` to the
``device:inode`` of that stream, systemd.exec(5)), each line starts with the
sd-daemon priority prefix ``<N>`` (sd-daemon(3)), which journald strips and
stores as the entry's priority, and the time stamp is left out (the journal
keeps its own):

==========  =========  ==============
Python      prefix     syslog name
==========  =========  ==============
CRITICAL    ``<2>``    crit
ERROR       ``<3>``    err
WARNING     ``<4>``    warning
INFO        ``<6>``    info
DEBUG       ``<7>``    debug
==========  =========  ==============

So ``journalctl -u leadline -p warning`` shows warnings and worse.

JSON lines
----------
``--log-format json`` writes one object per line: ``time`` (UTC ISO 8601),
``level``, ``priority`` (the number above), ``logger``, ``message`` (escaped
as above), and ``exception`` when there is one.
"""

from __future__ import annotations

import json
import logging
import os
import sys
from datetime import datetime, timezone
from typing import Any, TextIO

from ..sinks.safe_text import safe_text

LEVELS = ("debug", "info", "warning", "error")
FORMATS = ("text", "json")


def syslog_priority(levelno: int) -> int:
    """The syslog priority of a Python log level (see the module table)."""
    if levelno >= logging.CRITICAL:
        return 2
    if levelno >= logging.ERROR:
        return 3
    if levelno >= logging.WARNING:
        return 4
    if levelno >= logging.INFO:
        return 6
    return 7


def stream_is_journal(stream: TextIO, environ: dict[str, str] | None = None) -> bool:
    """True when ``stream`` is the journal stream systemd connected ($JOURNAL_STREAM)."""
    value = (os.environ if environ is None else environ).get("JOURNAL_STREAM", "")
    device, _, inode = value.partition(":")
    try:
        st = os.fstat(stream.fileno())
        return (st.st_dev, st.st_ino) == (int(device), int(inode))
    except (ValueError, OSError, AttributeError):
        return False


class SafeTextFormatter(logging.Formatter):
    """``TIME LEVEL LOGGER MESSAGE`` (or ``<N>LEVEL LOGGER MESSAGE`` for the journal), message escaped."""

    def __init__(self, journal: bool = False) -> None:
        fmt = "%(levelname)s %(name)s %(message)s" if journal else "%(asctime)s %(levelname)s %(name)s %(message)s"
        super().__init__(fmt)
        self.journal = journal

    def formatMessage(self, record: logging.LogRecord) -> str:  # noqa: N802 - logging's name
        record.message = safe_text(record.message)
        text = super().formatMessage(record)
        return f"<{syslog_priority(record.levelno)}>{text}" if self.journal else text


class JsonLineFormatter(logging.Formatter):
    """One JSON object per record (see the module notes)."""

    def __init__(self, journal: bool = False) -> None:
        super().__init__()
        self.journal = journal

    def format(self, record: logging.LogRecord) -> str:
        priority = syslog_priority(record.levelno)
        document = {
            "time": datetime.fromtimestamp(record.created, tz=timezone.utc).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "priority": priority,
            "logger": record.name,
            "message": safe_text(record.getMessage()),
        }
        if record.exc_info:
            document["exception"] = self.formatException(record.exc_info)
        line = json.dumps(document, ensure_ascii=True)
        return f"<{priority}>{line}" if self.journal else line


def configure_logging(level: str = "info", fmt: str = "text", stream: TextIO | None = None) -> logging.Handler:
    """Send the root logger's records to ``stream`` (standard error) at ``level`` in ``fmt``.

    Replaces the handlers a former call installed; returns the new handler.
    """
    if level not in LEVELS:
        raise ValueError(f"log level must be one of {LEVELS}, got {level!r}")
    if fmt not in FORMATS:
        raise ValueError(f"log format must be one of {FORMATS}, got {fmt!r}")
    stream = sys.stderr if stream is None else stream
    journal = stream_is_journal(stream)
    handler = logging.StreamHandler(stream)
    handler.setFormatter(JsonLineFormatter(journal) if fmt == "json" else SafeTextFormatter(journal))
    handler.set_name("leadline")
    root = logging.getLogger()
    for old in list(root.handlers):
        if old.get_name() == "leadline":
            root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(getattr(logging, level.upper()))
    return handler


__all__ = ["FORMATS", "LEVELS", "JsonLineFormatter", "SafeTextFormatter", "configure_logging", "log_fields",
           "stream_is_journal", "syslog_priority"]

def log_fields(message: str, **fields: Any) -> str:
    """``message key=value ...``: one structured log line."""
    parts = [message]
    for key, value in fields.items():
        text = f"{value:.4g}" if isinstance(value, float) else str(value)
        if " " in text or "=" in text:
            text = '"' + text.replace('"', "'") + '"'
        parts.append(f"{key}={text}")
    return " ".join(parts)
