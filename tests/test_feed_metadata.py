"""Feed metadata: description, unit, site, tag and time zone in the config; a unit that changes on
a feed is an event of its own; the metadata reaches the alarm payload.

The service runs on a real followed CSV file and a real SQLite store; the source also reports the
unit of its feeds, as a SenML source does with its "u" field (RFC 8428 section 4.5.2).
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

from leadline.adapters.config import config_from_text
from leadline.adapters.service import Service
from leadline.adapters.service.wiring import feed_metadata_of
from leadline.adapters.sinks.alarm_publisher import event_payload
from leadline.adapters.sources import CsvFollower, CsvLayout
from leadline.adapters.store import open_store
from leadline.detector.events import CAUTION, AlarmEvent

from test_service_ports import ScriptedEngine

UTC = timezone.utc
T0 = datetime(2026, 10, 19, 6, 0, tzinfo=UTC)
FEED = "fenwick/reservoir/level"

CONFIG = """
[store]
url = "events.db"

[feeds.defaults]
site = "Fenwick Vale"

[[feeds.override]]
match = "fenwick/reservoir/*"
unit = "m"
description = "service reservoir level"
tag = "LT-101"
timezone = "Europe/London"
"""


def test_metadata_comes_from_defaults_and_overrides():
    meta = feed_metadata_of(config_from_text(CONFIG, "site.toml"))
    assert meta(FEED) == {"description": "service reservoir level", "unit": "m", "site": "Fenwick Vale",
                          "tag": "LT-101", "timezone": "Europe/London"}
    assert meta("fenwick/dm-east/flow")["unit"] is None and meta("fenwick/dm-east/flow")["site"] == "Fenwick Vale"


def test_the_alarm_payload_carries_the_feed_metadata_before_the_caution():
    event = AlarmEvent(FEED, "spike", "alarm", T0, None, value_at_onset=7.0)
    payload = event_payload(event, {"unit": "m", "description": "service reservoir level", "tag": None})
    assert payload["feed"] == {"unit": "m", "description": "service reservoir level"}
    assert list(payload)[-1] == "caution" and payload["caution"] == CAUTION
    assert "feed" not in event_payload(event)


class UnitReportingFollower(CsvFollower):
    """A CSV follower that also reports units, as a SenML source does: "m", then "cm" from row 6 on."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.seen = 0

    def poll(self, max_items, timeout_s):
        readings = super().poll(1, timeout_s)  # one row per poll, so each row's unit is told apart
        self.seen += len(readings)
        self.units = {FEED: "m" if self.seen <= 5 else "cm"} if readings else {}
        return readings

    def take_units(self):
        units, self.units = getattr(self, "units", {}), {}
        return units


def test_a_unit_change_is_an_event_of_its_own_and_recorded_in_the_feed_status(tmp_path):
    csv = tmp_path / "levels.csv"
    csv.write_text("timestamp,feed,value\n" + "".join(
        f"{(T0 + timedelta(minutes=15 * i)).isoformat()},{FEED},{1 + i * 0.01}\n" for i in range(10)))
    config = config_from_text(CONFIG, str(tmp_path / "site.toml"))
    store = open_store(str(tmp_path / "events.db"))
    follower = UnitReportingFollower("meters", str(csv), CsvLayout(), from_start=True, rotate_grace_s=0.0,
                                     rescan_interval_s=0.0)
    service = Service(engine=ScriptedEngine(), store=store, sources=[follower], refit_workers=0,
                      clock="readings", metadata=feed_metadata_of(config))
    assert service.run(until_idle=lambda: service.readings_total >= 10) == 0
    try:
        (event,) = [s.event for s in store.events()]
        assert (event.rule, event.severity) == ("unit_change", "warning")
        assert event.start == event.end == T0 + timedelta(minutes=15 * 5)  # opened and closed at once
        assert event.parameters == {"previous_unit": "m", "unit": "cm"}
        assert store.feed_status()[FEED].unit == "cm"
    finally:
        store.close()
