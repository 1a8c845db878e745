"""The figures of a replay: readings, feeds, events, incidents, alarms per feed-week and per shift.

An *alarm* here is an event of severity ``alarm`` other than ``meter_reset``
(a fact about a register, not an anomaly). A *feed-week* is one feed
watched for a week of reading time: the sum over feeds of (last reading -
first reading) / 7 days. Incidents are counted by
:class:`~leadline.detector.incidents.IncidentGrouper` over each feed's
events in the order the engine gave them.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable, Mapping

from leadline.detector.durations import WEEK_S
from leadline.detector.events import AlarmEvent
from leadline.detector.incidents import IncidentGrouper

from .history import FeedHistory

__all__ = ["ReplaySummary", "final_events", "summarise", "SHIFT_S"]

#: An eight-hour shift (common practice for round-the-clock control rooms).
SHIFT_S = 8 * 3600.0


def final_events(events: Iterable[AlarmEvent]) -> dict[tuple, AlarmEvent]:
    """The last version of each event under the store's key (start, feed, rule), as the store keeps it."""
    out: dict[tuple, AlarmEvent] = {}
    for event in events:
        out[(event.feed_id, event.rule, event.start)] = event
    return out


@dataclass(frozen=True)
class ReplaySummary:
    readings: int
    feeds: int
    events: int
    incidents: int
    alarms: int
    feed_weeks: float
    span_s: float

    @property
    def alarms_per_feed_week(self) -> float:
        return self.alarms / self.feed_weeks if self.feed_weeks > 0 else float("nan")

    @property
    def alarms_per_shift(self) -> float:
        """Alarms of the whole site per eight-hour shift of reading time."""
        return self.alarms / (self.span_s / SHIFT_S) if self.span_s > 0 else float("nan")

    def lines(self) -> list[str]:
        return [f"readings {self.readings}", f"feeds {self.feeds}", f"events {self.events}",
                f"incidents {self.incidents}", f"alarms {self.alarms}",
                f"alarms per feed-week {self.alarms_per_feed_week:.3g} (over {self.feed_weeks:.3g} feed-weeks)",
                f"alarms per 8-hour shift (site) {self.alarms_per_shift:.3g}"]


def is_alarm(event: AlarmEvent) -> bool:
    return event.severity == "alarm" and event.rule != "meter_reset"


def summarise(histories: Mapping[str, FeedHistory], events_in_order: Iterable[AlarmEvent]) -> ReplaySummary:
    """The summary of a replay whose engine gave ``events_in_order``."""
    groupers: dict[str, IncidentGrouper] = {}
    incidents: set[tuple] = set()
    ordered = list(events_in_order)
    for event in ordered:
        if event.rule == "meter_reset":
            continue
        grouper = groupers.setdefault(event.feed_id, IncidentGrouper())
        tagged = grouper.tag(event)
        incidents.add((event.feed_id, tagged.incident_start))
    final = final_events(ordered)
    feed_s = 0.0
    first, last = float("inf"), float("-inf")
    readings = 0
    for h in histories.values():
        readings += len(h)
        if len(h):
            lo, hi = float(h.epoch_s.min()), float(h.epoch_s.max())
            feed_s += hi - lo
            first, last = min(first, lo), max(last, hi)
    return ReplaySummary(readings=readings, feeds=len(histories), events=len(final), incidents=len(incidents),
                         alarms=sum(1 for e in final.values() if is_alarm(e)), feed_weeks=feed_s / WEEK_S,
                         span_s=max(0.0, last - first) if readings else 0.0)
