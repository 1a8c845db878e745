"""Read a CSV history into one (time, value) array pair per feed.

The rows are parsed by the followers' own code
(:class:`~leadline.adapters.sources.csv_follow.CsvFollower` with
:class:`~leadline.adapters.sources.csv_rows.RowParser`), read once from the
first byte to the end of each file, final line included. Only the arrays are
kept (16 bytes per reading), so a month of one-minute readings of a thousand
feeds fits in memory, and a feed's history is cheap to ship to a worker.
"""

from __future__ import annotations

import glob
import heapq
import os
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Iterable, Iterator

import numpy as np

from leadline.detector.errors import ConfigError
from leadline.detector.readings import Reading

from ..sources.csv_follow import CsvFollower
from ..sources.csv_rows import CsvLayout

__all__ = ["FeedHistory", "History", "read_history", "readings_of"]


@dataclass(frozen=True)
class FeedHistory:
    """The readings of one feed in reading order: epoch seconds (UTC) and values (NaN = empty)."""

    feed_id: str
    epoch_s: np.ndarray
    values: np.ndarray

    def __len__(self) -> int:
        return int(self.epoch_s.size)


@dataclass
class History:
    """Every feed's history, and what reading it cost."""

    feeds: dict[str, FeedHistory] = field(default_factory=dict)
    rejected: int = 0
    files: int = 0

    @property
    def readings(self) -> int:
        return sum(len(f) for f in self.feeds.values())


class _Columns:
    __slots__ = ("epochs", "values")

    def __init__(self) -> None:
        self.epochs: list[float] = []
        self.values: list[float] = []


def _pattern(path: str) -> str:
    """A folder stands for the CSV files in it."""
    return os.path.join(path, "*.csv") if os.path.isdir(path) else path


def read_history(sources: Iterable[tuple[str, str, CsvLayout]], *, start: datetime | None = None,
                 end: datetime | None = None, batch: int = 50_000) -> History:
    """Read ``(name, path or glob or folder, layout)`` sources from their first byte to their end.

    Parameters
    ----------
    sources : iterable of (str, str, CsvLayout)
    start, end : datetime, optional
        Keep readings with ``start <= time < end`` (UTC-aware).

    Raises
    ------
    ConfigError
        A source matches no file.
    """
    columns: dict[str, _Columns] = {}
    history = History()
    lo = start.timestamp() if start is not None else -np.inf
    hi = end.timestamp() if end is not None else np.inf
    for name, path, layout in sources:
        pattern = _pattern(path)
        matched = glob.glob(pattern)
        if not matched:
            raise ConfigError(f"replay source {name!r}: {pattern!r} matches no file")
        history.files += len(matched)
        follower = CsvFollower(name, pattern, layout, from_start=True, rotate_grace_s=0.0)
        follower.start()
        try:
            while True:
                readings = follower.poll(batch, 0.0)
                if not readings:
                    readings = follower.finish()
                    _keep(readings, columns, lo, hi)
                    break
                _keep(readings, columns, lo, hi)
            history.rejected += int(follower.counts()["rejected"])
        finally:
            follower.stop()
    for feed_id in sorted(columns):
        col = columns[feed_id]
        history.feeds[feed_id] = FeedHistory(feed_id, np.asarray(col.epochs, dtype=float),
                                             np.asarray(col.values, dtype=float))
    return history


def _keep(readings: list[Reading], columns: dict[str, _Columns], lo: float, hi: float) -> None:
    for reading in readings:
        epoch = reading.timestamp.timestamp()
        if not lo <= epoch < hi:
            continue
        col = columns.get(reading.feed_id)
        if col is None:
            col = columns[reading.feed_id] = _Columns()
        col.epochs.append(epoch)
        col.values.append(reading.value)


def readings_of(feeds: Iterable[FeedHistory]) -> Iterator[Reading]:
    """The readings of several feeds merged on time; each feed keeps its own order (ties: feed order)."""

    def one(feed: FeedHistory) -> Iterator[tuple[float, Reading]]:
        feed_id = feed.feed_id
        for epoch, value in zip(feed.epoch_s.tolist(), feed.values.tolist()):
            yield epoch, Reading(feed_id, datetime.fromtimestamp(epoch, tz=timezone.utc), value)

    for _, reading in heapq.merge(*(one(f) for f in feeds), key=lambda pair: pair[0]):
        yield reading
