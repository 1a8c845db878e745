"""The feed status and heartbeat tables: the upgrade step that adds them, and their upserts.

Run on a real SQLite file and on PostgreSQL (the ``store_url`` fixture).
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import pytest
from sqlalchemy import inspect

from leadline.adapters.ports import FeedStatusRow, Heartbeat
from leadline.adapters.store import SCHEMA_VERSION, open_store, upgrade_store
from leadline.adapters.store.connect import create_store_engine, resolve_url, write_transaction
from leadline.adapters.store.migrations import create_schema
from leadline.detector.errors import SchemaVersionError

from store_helpers import store_url  # noqa: F401 - fixture

UTC = timezone.utc
T0 = datetime(2026, 10, 19, 6, 0, tzinfo=UTC)
FEED = "fenwick/north/flow"


def test_a_version_3_store_is_upgraded_to_hold_feed_status(store_url):
    engine = create_store_engine(resolve_url(store_url))
    with write_transaction(engine, "making a v3 store") as conn:
        create_schema(conn, version=3)
    engine.dispose()
    with pytest.raises(SchemaVersionError, match="schema version 3, older"):
        open_store(store_url)
    assert upgrade_store(store_url) == SCHEMA_VERSION >= 4
    engine = create_store_engine(resolve_url(store_url))
    with engine.connect() as conn:
        assert {"feed_status", "service_heartbeat"} <= set(inspect(conn).get_table_names())
    engine.dispose()


def test_feed_status_is_upserted_per_feed_and_the_latest_heartbeat_kept(store_url):
    with open_store(store_url) as store:
        store.stage_feed_status(FeedStatusRow(FEED, "learning", T0, 41.5, "scada", "m3/h", 900.0, 10, 672))
        store.stage_heartbeat(Heartbeat("leadline", T0, T0 + timedelta(seconds=5), 5.0, 101, "0.1.0"))
        store.flush()
        store.stage_feed_status(FeedStatusRow(FEED, "watching", T0 + timedelta(hours=7), float("nan"), "scada",
                                              "m3/h", 900.0, None, None))
        store.stage_heartbeat(Heartbeat("leadline", T0, T0 + timedelta(seconds=10), 5.0, 101, "0.1.0"))
        store.flush()
        (row,) = store.feed_status().values()
        assert (row.state, row.last_reading_at, row.last_value, row.learning_have) == (
            "watching", T0 + timedelta(hours=7), None, None)
        (beat,) = store.heartbeats()
        assert beat.beat_at == T0 + timedelta(seconds=10) and beat.started_at == T0
        assert beat.alive(T0 + timedelta(seconds=20)) and not beat.alive(T0 + timedelta(seconds=30))
        # the feed row exists for the status row's foreign key
        assert [f.feed_id for f in store.feeds()] == [FEED]


def test_status_rows_of_feeds_with_readings_only_wait_for_the_status_interval(tmp_path):
    # a change of state is written with the next commit; a feed whose only news is readings at most
    # every status_interval_s, and always at shutdown (a forced commit)
    import time

    from engine_helpers import settings

    from leadline.adapters.service.loop import Service
    from leadline.detector.engine import Engine
    from leadline.detector.readings import Reading

    store = open_store(str(tmp_path / "s.db"))
    engine = Engine(lambda feed_id: settings())
    service = Service(engine=engine, store=store, sources=[], refit_workers=0)
    t0 = datetime(2026, 5, 4, tzinfo=timezone.utc)
    for feed_id in ("reads-only", "changed"):
        engine.process(Reading(feed_id, t0, 40.0))
    service.status_interval_s = 3600.0
    service._last_status = time.monotonic()
    service._read_feeds = {"reads-only"}
    service._changed_feeds = {"changed"}
    service._commit()
    assert set(store.feed_status()) == {"changed"}
    service._read_feeds.add("reads-only")
    service._commit(force=True)
    assert set(store.feed_status()) == {"changed", "reads-only"}
    assert store.feed_status()["reads-only"].last_value == 40.0
    store.close()
