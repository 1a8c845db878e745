"""The service loop against its ports: events reach the alarm publisher only once committed.

Real parts: a followed CSV file (:class:`CsvFollower`), the SQLite event store, and
:func:`run_service`. The engine is replaced by a scripted one (an alarm for every reading above a
limit), because what is checked here is the service's order of work, not the alarm rules: an
event is published after the transaction holding it (and the file mark of its row) committed,
every event is published once, and shutting down closes the publisher and the store.
"""

from __future__ import annotations

import threading
import time
from datetime import datetime, timedelta, timezone
from leadline.detector.engine_output import EngineOutput

import pytest

from leadline.adapters.ports import AlarmPublisher
from leadline.adapters.service import Service, run_service
from leadline.adapters.sources import CsvFollower, CsvLayout
from leadline.adapters.store import open_store
from leadline.detector.errors import StoreError
from leadline.detector.events import AlarmEvent

UTC = timezone.utc
T0 = datetime(2026, 10, 19, 6, 0, tzinfo=UTC)
LIMIT = 6.5
FEED = "fenwick/reservoir/level"


class ScriptedEngine:
    """Stands in for the core's Engine: one alarm event for each reading above ``LIMIT``."""

    last = None
    last_value = None

    def process(self, reading):
        self.last, self.last_value = reading.timestamp, reading.value
        events = []
        if reading.value > LIMIT:
            events.append(AlarmEvent(reading.feed_id, "range", "alarm", reading.timestamp,
                                     value_at_onset=reading.value, detail="above the scripted limit"))
        return EngineOutput(events=events)

    def tick(self, now):
        return EngineOutput()

    def checkpoints(self):
        return {}

    def feed_status(self, feed_id):
        return {"state": "watching", "last_reading_time": self.last.isoformat(), "last_value": self.last_value,
                "interval_s": 900.0}

    def status(self):
        return []


class CheckingPublisher:
    """An :class:`AlarmPublisher` that looks in the store, through its query side, at each publish."""

    def __init__(self, db_url: str) -> None:
        self.queries = open_store(db_url)
        self.published: list[AlarmEvent] = []
        self.committed_at_publish: list[bool] = []
        self.marks_at_publish: list[int] = []
        self.closed = False

    def publish(self, event: AlarmEvent) -> None:
        keys = {(s.event.feed_id, s.event.start) for s in self.queries.events()}
        self.committed_at_publish.append((event.feed_id, event.start) in keys)
        self.marks_at_publish.append(sum(o.offset_bytes for o in self.queries.load_offsets("meters").values()))
        self.published.append(event)

    def close(self) -> None:
        self.closed = True
        self.queries.close()


def test_events_are_published_after_their_commit_and_shutdown_closes_everything(tmp_path):
    csv = tmp_path / "levels.csv"
    lines = ["timestamp,feed,value"] + [f"{(T0 + timedelta(minutes=15 * i)).isoformat()},{FEED},{i}"
                                        for i in range(10)]
    csv.write_text("\n".join(lines) + "\n")
    db_url = f"sqlite:///{tmp_path / 'events.db'}"
    store = open_store(db_url)
    publisher = CheckingPublisher(db_url)
    assert isinstance(publisher, AlarmPublisher)
    follower = CsvFollower("meters", str(csv), CsvLayout(), from_start=True, rotate_grace_s=0.0,
                           rescan_interval_s=0.0)
    service = Service(engine=ScriptedEngine(), store=store, sources=[follower], publisher=publisher,
                      refit_workers=0, clock="readings")

    def stop_when_read() -> None:
        deadline = time.monotonic() + 60.0
        while service.readings_total < 10 and time.monotonic() < deadline:
            time.sleep(0.05)
        service.request_stop()

    stopper = threading.Thread(target=stop_when_read, daemon=True)
    stopper.start()
    assert run_service(service) == 0
    stopper.join()

    assert service.readings_total == 10
    assert [e.value_at_onset for e in publisher.published] == [7.0, 8.0, 9.0]
    assert publisher.committed_at_publish == [True, True, True]
    # the mark of the row that raised each event was committed with it
    assert all(mark > 0 for mark in publisher.marks_at_publish)
    assert publisher.closed
    with pytest.raises(StoreError, match="closed"):
        store.flush()
    reopened = open_store(db_url)
    try:
        assert [s.event.value_at_onset for s in reopened.events()] == [7.0, 8.0, 9.0]
        (offset,) = reopened.load_offsets("meters").values()
        assert offset.offset_bytes == csv.stat().st_size
    finally:
        reopened.close()


def test_a_shelved_feed_is_recorded_not_published_and_the_service_reports_its_feeds(tmp_path):
    import os

    csv = tmp_path / "levels.csv"
    lines = ["timestamp,feed,value"] + [f"{(T0 + timedelta(minutes=15 * i)).isoformat()},{FEED},{i}"
                                        for i in range(10)]
    csv.write_text("\n".join(lines) + "\n")
    db_url = f"sqlite:///{tmp_path / 'events.db'}"
    store = open_store(db_url)
    store.ensure_feed(FEED)
    now = datetime.now(UTC)
    store.shelve(FEED, "R. Okonkwo", "sensor swap", now + timedelta(hours=2), at=now - timedelta(seconds=1))
    publisher = CheckingPublisher(db_url)
    follower = CsvFollower("meters", str(csv), CsvLayout(), from_start=True, rotate_grace_s=0.0,
                           rescan_interval_s=0.0)
    service = Service(engine=ScriptedEngine(), store=store, sources=[follower], publisher=publisher,
                      refit_workers=0, clock="readings")
    assert service.run(until_idle=lambda: service.readings_total >= 10) == 0
    assert service.shelved(FEED) and not service.shelved("fenwick/other")
    store.flush()
    assert publisher.published == [] and service.events_withheld == 3
    publisher.close()
    reopened = open_store(db_url)
    try:
        # recorded all the same
        assert [s.event.value_at_onset for s in reopened.events()] == [7.0, 8.0, 9.0]
        row = reopened.feed_status()[FEED]
        assert (row.state, row.source, row.last_value) == ("watching", "meters", 9.0)
        assert row.last_reading_at == T0 + timedelta(minutes=15 * 9)
        (beat,) = reopened.heartbeats()
        assert beat.pid == os.getpid() and beat.alive(datetime.now(UTC))
        assert not beat.alive(beat.beat_at + timedelta(seconds=3 * beat.beat_interval_s + 1))
    finally:
        reopened.close()
        store.close()
