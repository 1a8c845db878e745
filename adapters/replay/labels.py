"""The labels file of ``leadline tune``: known faults of a site's history.

A CSV file of our own, with the header ``feed,start,end,kind,note``:

* ``feed``: the feed id, as the readings name it;
* ``start``, ``end``: ISO 8601 times with a UTC offset (``2026-04-10T09:00:00+00:00``
  or ``...Z``); ``end`` not before ``start`` (equal for a single wild reading);
* ``kind``: a word of the site's own (``spike``, ``level shift``, ``stuck meter``);
  recall and detection delay are reported per kind;
* ``note``: free text, ignored.

Bad rows are refused with the file, the line and what was expected.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

from leadline.detector.errors import ConfigError

__all__ = ["HEADER", "Label", "read_labels"]

HEADER = ("feed", "start", "end", "kind", "note")


@dataclass(frozen=True)
class Label:
    feed_id: str
    start: datetime
    end: datetime
    kind: str
    note: str = ""


def _time(text: str, where: str, column: str) -> datetime:
    value = text.strip()
    if value.endswith(("Z", "z")):
        value = value[:-1] + "+00:00"
    try:
        when = datetime.fromisoformat(value)
    except ValueError as exc:
        raise ConfigError(f"{where}: {column}: expected an ISO 8601 time with offset, got {text!r}") from exc
    if when.tzinfo is None:
        raise ConfigError(f"{where}: {column}: {text!r} has no UTC offset")
    return when.astimezone(timezone.utc)


def read_labels(path: str | Path) -> list[Label]:
    """The labels of ``path`` (see the module's docstring)."""
    path = Path(path)
    try:
        with path.open(newline="", encoding="utf-8") as handle:
            rows = list(csv.reader(handle))
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise ConfigError(f"{path}: cannot read the labels: {exc}") from exc
    if not rows or tuple(c.strip() for c in rows[0]) != HEADER:
        raise ConfigError(f"{path}:1: expected the header {','.join(HEADER)}")
    labels = []
    for number, row in enumerate(rows[1:], start=2):
        if not row or not any(cell.strip() for cell in row):
            continue
        where = f"{path}:{number}"
        if len(row) != len(HEADER):
            raise ConfigError(f"{where}: expected {len(HEADER)} columns ({','.join(HEADER)}), got {len(row)}")
        feed, start, end, kind, note = (cell.strip() for cell in row)
        if not feed or not kind:
            raise ConfigError(f"{where}: feed and kind must not be empty")
        label = Label(feed, _time(start, where, "start"), _time(end, where, "end"), kind, note)
        if label.end < label.start:
            raise ConfigError(f"{where}: end {end} is before start {start}")
        labels.append(label)
    return labels
