"""What the service tells about its feeds and itself: feed status, heartbeat, shelving, units.

:class:`FeedReports` is a part of :class:`~.loop.Service` (a base class, so
the loop stays one module's length): it stages the status of the feeds that
changed and the heartbeat for ``leadline status``, keeps the shelving notes
in force (read every ``shelving_refresh_s``) so that no event of a shelved
feed is published, and turns a change of a feed's unit into a
``unit_change`` event. Like the loop, it uses the store only through
:class:`~leadline.adapters.ports.EventSink`.
"""

from __future__ import annotations

import logging
import os
import time
from datetime import datetime, timezone
from typing import Any

from leadline.detector.errors import LeadlineError, StoreError
from leadline.detector.events import AlarmEvent

from ..ports import EventSink, FeedStatusRow, Heartbeat
from .log_setup import log_fields

logger = logging.getLogger("leadline.service")


def _utc_now() -> datetime:
    return datetime.now(timezone.utc)


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("leadline")
    except PackageNotFoundError:
        return "unknown"



class FeedReports:
    """Feed status, heartbeat, shelving and units of a :class:`~.loop.Service` (set up by its ``__init__``)."""

    store: EventSink
    engine: Any
    heartbeat_interval_s: float
    shelving_refresh_s: float
    service_name: str
    started_at: datetime
    feed_sources: dict[str, str]
    feed_units: dict[str, str]
    events_total: int
    _last_beat: float
    _last_shelving_read: float
    _shelved: dict[str, datetime]
    _changed_feeds: set[str]
    _read_feeds: set[str]
    _last_status: float
    #: Seconds between the status rows of feeds whose only news is readings (their last reading
    #: time and value); a change of state goes with the next commit. At 10,000 busy feeds a row
    #: per feed per commit was half the store's time.
    status_interval_s: float = 5.0
    _to_publish: list[AlarmEvent]

    def _beat(self, now_monotonic: float) -> None:
        """Stage the heartbeat when ``heartbeat_interval_s`` has passed since the last one."""
        if now_monotonic - self._last_beat >= self.heartbeat_interval_s:
            self._last_beat = now_monotonic
            self.store.stage_heartbeat(Heartbeat(self.service_name, self.started_at, _utc_now(),
                                                 self.heartbeat_interval_s, os.getpid(), _version()))

    def _note_unit(self, feed_id: str, unit: str, at: datetime) -> None:
        """Record a feed's unit; a change of unit is an event of its own (``unit_change``, warning)."""
        before = self.feed_units.get(feed_id)
        self.feed_units[feed_id] = unit
        self._changed_feeds.add(feed_id)
        if before is None or before == unit:
            return
        event = AlarmEvent(feed_id, "unit_change", "warning", at, at, parameters={"previous_unit": before,
                                                                                 "unit": unit},
                           detail=f"unit changed from {before!r} to {unit!r}; check the readings' scale")
        self.store.stage_event(event)
        self._to_publish.append(event)
        self.events_total += 1
        logger.warning(_fields("unit changed", feed=feed_id, before=before, unit=unit))

    def _stage_feed_status(self, force: bool = False) -> None:
        """Stage the status of the feeds that changed state since the last commit, and every
        ``status_interval_s`` (or when ``force``) of those that had readings."""
        changed, self._changed_feeds = self._changed_feeds, set()
        now = time.monotonic()
        if force or now - self._last_status >= self.status_interval_s:
            changed |= self._read_feeds
            self._read_feeds = set()
            self._last_status = now
        for feed_id in sorted(changed):
            try:
                st = self.engine.feed_status(feed_id)
            except LeadlineError:
                continue
            learning = st.get("learning") or {}
            last = st.get("last_reading_time")
            self.store.stage_feed_status(FeedStatusRow(
                feed_id=feed_id, state=st["state"],
                last_reading_at=datetime.fromisoformat(last) if last else None,
                last_value=st.get("last_value"), source=self.feed_sources.get(feed_id),
                unit=self.feed_units.get(feed_id), interval_s=st.get("interval_s"),
                learning_have=learning.get("readings"), learning_need=learning.get("train_points")))

    def shelved(self, feed_id: str) -> bool:
        """Whether ``feed_id`` is shelved now (the store's notes, read at most every ``shelving_refresh_s``)."""
        mono = time.monotonic()
        if mono - self._last_shelving_read >= self.shelving_refresh_s:
            self._last_shelving_read = mono
            try:
                self._shelved = self.store.shelving_in_force(_utc_now())
            except StoreError as exc:  # keep the last known shelving while the store is away
                logger.warning(_fields("shelving not read; the last known is kept", error=str(exc)))
        until = self._shelved.get(feed_id)
        return until is not None and until > _utc_now()



def _fields(message: str, **fields: Any) -> str:
    return log_fields(message, **fields)
