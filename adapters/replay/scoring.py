"""Judge a replay's events against labelled faults: recall, precision, detection delay.

Definitions (one place, used by ``leadline tune`` and by
``tests/benchmarks/bench_detection.py``):

* a labelled fault is *found* when an event of its feed starts within
  ``[start, end + grace]`` (:func:`first_start_within`); its *detection
  delay* is that first start less the fault's start;
* *precision* = events whose active span ``[start, end]`` (an open event:
  up to the end of the history) overlaps some labelled fault's
  ``[start, end + grace]`` on its feed, over all events;
* a *false alarm* is an event that overlaps no labelled fault.

``meter_reset`` events are facts about a register and are left out.
"""

from __future__ import annotations

import statistics
from collections import defaultdict
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Iterable, Sequence

import numpy as np

from leadline.detector.events import AlarmEvent

from .labels import Label

__all__ = ["Score", "first_start_within", "score_events"]


def first_start_within(starts: np.ndarray, lo: float, hi: float, *, inclusive: bool = False) -> float | None:
    """The earliest of ``starts`` in ``[lo, hi)`` (``[lo, hi]`` when ``inclusive``), or None.

    The one hit rule of fault finding: ``starts`` are event starts in any
    unit (readings since a trial began, epoch seconds), ``lo`` the fault's
    onset and ``hi`` the end of its window.
    """
    starts = np.asarray(starts, dtype=float)
    upper = starts <= hi if inclusive else starts < hi
    hit = starts[(starts >= lo) & upper]
    return float(hit.min()) if hit.size else None


@dataclass
class Score:
    """Recall and delays per fault kind, precision and false alarms over all events."""

    found: dict[str, list[bool]] = field(default_factory=lambda: defaultdict(list))
    delays_s: dict[str, list[float]] = field(default_factory=lambda: defaultdict(list))
    events: int = 0
    true_events: int = 0

    @property
    def false_alarms(self) -> int:
        return self.events - self.true_events

    @property
    def precision(self) -> float:
        return self.true_events / self.events if self.events else float("nan")

    def recall(self, kind: str | None = None) -> float:
        hits = [h for k, v in self.found.items() if kind in (None, k) for h in v]
        return sum(hits) / len(hits) if hits else float("nan")

    def median_delay_s(self, kind: str) -> float:
        delays = self.delays_s.get(kind) or []
        return float(statistics.median(delays)) if delays else float("nan")

    @property
    def kinds(self) -> list[str]:
        return sorted(self.found)


def score_events(events: Iterable[AlarmEvent], labels: Sequence[Label], *, grace_s: float,
                 history_end: datetime) -> Score:
    """Score the final events of a replay (one per key) against ``labels``; see the module's docstring."""
    grace = timedelta(seconds=float(grace_s))
    by_feed: dict[str, list[AlarmEvent]] = defaultdict(list)
    for event in events:
        if event.rule != "meter_reset":
            by_feed[event.feed_id].append(event)
    labels_of: dict[str, list[Label]] = defaultdict(list)
    for label in labels:
        labels_of[label.feed_id].append(label)
    score = Score()
    for label in labels:
        starts = np.array([e.start.timestamp() for e in by_feed.get(label.feed_id, ())], dtype=float)
        first = first_start_within(starts, label.start.timestamp(), (label.end + grace).timestamp(), inclusive=True)
        score.found[label.kind].append(first is not None)
        if first is not None:
            score.delays_s[label.kind].append(first - label.start.timestamp())
    for feed_id, feed_events in by_feed.items():
        windows = [(lb.start, lb.end + grace) for lb in labels_of.get(feed_id, ())]
        for event in feed_events:
            score.events += 1
            end = event.end or history_end
            if any(event.start <= hi and end >= lo for lo, hi in windows):
                score.true_events += 1
    return score
