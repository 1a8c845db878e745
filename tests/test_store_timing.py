"""The store's time per part of a flush: the counters add up, land in the right part, and are logged.

Counters are checked against what is outside them: a scripted clock (exact sums), the wall
time measured around each real flush on SQLite and PostgreSQL (the parts add up to no more
than it), and which tables a flush touched (a flush of journal rows only has no event time).
The service test runs the real engine and store on a followed CSV file and reads the log lines.
"""

from __future__ import annotations

import logging
import re
import time
from datetime import datetime, timedelta, timezone

import pytest

from engine_helpers import settings
from leadline.adapters.ports import STORE_TIME_PARTS, FeedStatusRow, StoreTime
from leadline.adapters.service import Service
from leadline.adapters.sources.csv_follow import CsvFollower
from leadline.adapters.sources.csv_rows import CsvLayout
from leadline.adapters.service.durability import Durability
from leadline.adapters.store import open_store
from leadline.adapters.store.timing import StoreTiming
from leadline.detector.engine import Engine
from leadline.detector.events import AlarmEvent
from store_helpers import store_url  # noqa: F401 - fixture

UTC = timezone.utc
T0 = datetime(2026, 9, 14, 6, 0, tzinfo=UTC)


class ScriptClock:
    """A clock that moves only when told: every reading of it is known in advance."""

    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_parts_add_up_exactly_and_commit_is_the_remainder():
    clock = ScriptClock()
    timing = StoreTiming(clock)
    with timing.flush():
        clock.now += 0.5  # opening the transaction
        with timing.part("journal"):
            clock.now += 2.0
        with timing.part("events"):
            clock.now += 1.0
        clock.now += 0.25  # committing
    with timing.flush():
        with timing.part("snapshots"):
            clock.now += 4.0
    clock.now += 2.25  # idle between flushes: in the window, in no part
    taken = timing.take()
    assert taken.flushes == 2
    assert taken.window_s == 10.0
    assert taken.seconds == {"events": 1.0, "journal": 2.0, "snapshots": 4.0, "status": 0.0, "other": 0.0,
                             "commit": 0.75}
    assert taken.total_s == 7.75
    fields = taken.fields()
    assert fields["busy_pct"] == 77.5
    assert sum(fields[f"{p}_pct"] for p in STORE_TIME_PARTS) == pytest.approx(100.0, abs=0.3)
    # take() starts again from zero
    clock.now += 1.0
    again = timing.take()
    assert again.flushes == 0 and again.total_s == 0.0 and again.window_s == 1.0


def test_a_failed_flush_still_counts_and_commit_is_never_a_part():
    clock = ScriptClock()
    timing = StoreTiming(clock)
    with pytest.raises(RuntimeError):
        with timing.flush():
            with timing.part("events"):
                clock.now += 1.0
            clock.now += 0.5
            raise RuntimeError("store down")
    assert timing.take().seconds["commit"] == 0.5
    with pytest.raises(ValueError, match="unknown store time part"):
        with timing.part("commit"):
            pass
    with pytest.raises(ValueError, match="unknown store time part"):
        with timing.part("evnets"):
            pass


def test_an_empty_window_has_no_shares():
    fields = StoreTime(window_s=0.0, flushes=0, seconds=dict.fromkeys(STORE_TIME_PARTS, 0.0)).fields()
    assert fields["busy_pct"] == 0.0 and all(fields[f"{p}_pct"] == 0.0 for p in STORE_TIME_PARTS)


def _event(feed: str, i: int) -> AlarmEvent:
    return AlarmEvent(feed, "spike", "alarm", T0 + timedelta(minutes=i), value_at_onset=1.0, peak_abs_z=7.0)


def test_real_flushes_put_each_table_in_its_part(store_url):  # noqa: F811 - fixture
    store = open_store(store_url)
    try:
        store.open_journal()
        store.take_store_time()  # from here on

        # 1. journal rows only: time in journal and commit, none in events, snapshots or status
        for i in range(500):
            store.stage_reading("fenwick/intake/flow", T0.timestamp() + 60 * i, float(i))
        outer = time.perf_counter()
        store.flush()
        outer = time.perf_counter() - outer
        only_journal = store.take_store_time()
        assert only_journal.flushes == 1
        s = only_journal.seconds
        assert s["journal"] > 0 and s["commit"] > 0
        assert s["events"] == s["snapshots"] == s["status"] == s["other"] == 0.0
        assert only_journal.total_s <= outer  # the parts are inside the flush's own wall time

        # 2. events, a snapshot and a feed status row in one flush: each has its part
        for i in range(50):
            store.stage_event(_event("fenwick/intake/flow", i))
        store.stage_snapshot("fenwick/intake/flow", 500, b"\x00" * 4096, 1)
        store.stage_feed_status(FeedStatusRow("fenwick/intake/flow", "watching", T0, 1.0, "scada", "m3/h", 60.0,
                                              None, None))
        outer = time.perf_counter()
        store.flush()
        outer = time.perf_counter() - outer
        mixed = store.take_store_time()
        assert mixed.flushes == 1
        assert all(mixed.seconds[p] > 0 for p in ("events", "snapshots", "status", "commit"))
        assert mixed.seconds["journal"] == 0.0 and mixed.seconds["other"] == 0.0
        assert mixed.total_s <= outer
        assert store.journal_counts() == {"fenwick/intake/flow": 500}  # the timed writes did happen
        assert len(store.events(since=T0 - timedelta(minutes=1), until=T0 + timedelta(hours=2))) == 50
    finally:
        store.close()


STORE_TIME_LINE = re.compile(r"store time (.*)")


def _fields_of(message: str) -> dict[str, float]:
    return {k: float(v) for k, v in (kv.split("=", 1) for kv in STORE_TIME_LINE.match(message).group(1).split())}


def test_the_service_logs_the_store_time_each_summary_and_at_shutdown(tmp_path, caplog):
    path = tmp_path / "flow.csv"
    rows = [f"{(T0 + timedelta(minutes=i)).isoformat()},northgate/flow,{40 + (i % 7) * 0.1}" for i in range(3000)]
    path.write_text("timestamp,feed,value\n" + "\n".join(rows) + "\n")
    store = open_store(str(tmp_path / "s.db"))
    follower = CsvFollower("scada", str(path), CsvLayout(), from_start=True)
    service = Service(engine=Engine(lambda feed: settings()), store=store, sources=[follower], refit_workers=0,
                      batch_size=200, summary_interval_s=1e-6, durability=Durability(store))
    with caplog.at_level(logging.INFO, logger="leadline.service"):
        assert service.run(until_idle=lambda: True) == 0
    lines = [r.getMessage() for r in caplog.records if r.getMessage().startswith("store time ")]
    assert len(lines) >= 2  # at least one summary, and the one at shutdown
    total_flushes = 0
    journal_s = 0.0
    for line in lines:
        fields = _fields_of(line)
        assert set(fields) == {"window_s", "flushes", "busy_pct"} | {f"{p}_{u}" for p in STORE_TIME_PARTS
                                                                     for u in ("s", "pct")}
        if fields["flushes"]:
            assert sum(fields[f"{p}_pct"] for p in STORE_TIME_PARTS) == pytest.approx(100.0, abs=0.5)
        total_flushes += int(fields["flushes"])
        journal_s += fields["journal_s"]
    assert total_flushes >= 1 and journal_s > 0  # 3,000 readings were journaled in those flushes
    assert store.journal_counts() == {"northgate/flow": 3000}
    store.close()
