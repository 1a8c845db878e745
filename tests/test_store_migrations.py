"""Schema versions on real databases: upgrade an old store, refuse newer or foreign ones."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import pytest
from sqlalchemy import inspect, text

from leadline.adapters.store import SCHEMA_VERSION, open_store, upgrade_store
from leadline.adapters.store import schema
from leadline.adapters.store.connect import create_store_engine, resolve_url, write_transaction
from leadline.adapters.store.migrations import create_schema
from leadline.detector.errors import SchemaVersionError
from leadline.detector.events import CAUTION

from store_helpers import store_url  # noqa: F401 - fixture

UTC = timezone.utc
T0 = datetime(2026, 3, 29, 1, 30, tzinfo=UTC)


def _engine(url: str):
    return create_store_engine(resolve_url(url))


def _make_v1_store(url: str, n_events: int) -> None:
    """A database as the first release wrote it, with a few events and a note."""
    engine = _engine(url)
    v1 = schema.build_metadata(1)
    ev, notes = v1.tables["events"], v1.tables["event_notes"]
    with write_transaction(engine, "making a v1 store") as conn:
        create_schema(conn, version=1)
        conn.execute(v1.tables["feeds"].insert(), [{"feed_id": "millbrook/flow/fm-01", "created_at": T0}])
        conn.execute(
            ev.insert(),
            [
                {"feed_id": "millbrook/flow/fm-01", "rule": "spike", "severity": "alarm",
                 "start_at": T0 + timedelta(minutes=25 * i), "parameters": {"limit_z": 4.0},
                 "detail": f"v1 event {i}", "caution": CAUTION, "created_at": T0, "updated_at": T0,
                 "peak_abs_z": 5.0 + i}
                for i in range(n_events)
            ],
        )
        conn.execute(notes.insert().values(event_id=1, feed_id="millbrook/flow/fm-01", kind="ack",
                                           operator="operator-k", text="seen", at=T0))
    engine.dispose()


def _shape(url: str) -> dict:
    """Tables, columns (name, nullability), indexes and unique constraints."""
    engine = _engine(url)
    with engine.connect() as conn:
        insp = inspect(conn)
        shape = {}
        for t in sorted(schema.TABLE_NAMES):
            shape[t] = {
                "columns": [(c["name"], c["nullable"]) for c in insp.get_columns(t)],
                "indexes": sorted((i["name"], tuple(i["column_names"])) for i in insp.get_indexes(t)),
                "unique": sorted((u["name"], tuple(u["column_names"])) for u in insp.get_unique_constraints(t)),
            }
    engine.dispose()
    return shape


def test_current_version_is_stamped_on_a_fresh_store(store_url: str) -> None:
    with open_store(store_url) as s:
        with s.engine.connect() as conn:
            versions = conn.execute(text("SELECT version FROM leadline_schema_version ORDER BY version")).all()
    assert [v for (v,) in versions] == list(range(1, SCHEMA_VERSION + 1))


def test_an_older_store_is_refused_until_upgraded_explicitly(store_url: str) -> None:
    n = 30  # spans 12.5 h, so several hour buckets
    _make_v1_store(store_url, n)
    with pytest.raises(SchemaVersionError, match=rf"schema version 1, older than version {SCHEMA_VERSION}.*upgraded explicitly"):
        open_store(store_url)
    assert upgrade_store(store_url) == SCHEMA_VERSION
    with open_store(store_url) as s:
        rows = s.events()
        assert [r.event.detail for r in rows] == [f"v1 event {i}" for i in range(n)]
        assert rows[0].acknowledged and rows[0].notes[0].operator == "operator-k"
        # the backfilled hour column serves the per-hour counts: 25-minute spacing from 01:30
        counts = s.alarm_counts_per_hour(T0, T0 + timedelta(minutes=25 * n))
        direct: dict[datetime, int] = {}
        for i in range(n):
            h = (T0 + timedelta(minutes=25 * i)).replace(minute=0)
            direct[h] = direct.get(h, 0) + 1
        assert {c.hour: c.count for c in counts if c.count} == direct
        # and the store keeps working on the upgraded database
        from leadline.detector.events import AlarmEvent

        s.stage_event(AlarmEvent("millbrook/flow/fm-01", "spike", "warning", T0))  # a replay of v1 event 0
        s.stage_event(AlarmEvent("millbrook/flow/fm-01", "cusum", "warning", T0))
        s.flush()
        assert len(s.events()) == n + 1


def test_open_store_can_upgrade_when_asked(store_url: str) -> None:
    _make_v1_store(store_url, 3)
    with open_store(store_url, upgrade=True) as s:
        assert len(s.events()) == 3


def test_an_upgraded_store_has_the_shape_of_a_fresh_one(store_url: str, tmp_path) -> None:
    _make_v1_store(store_url, 2)
    upgrade_store(store_url)
    upgraded = _shape(store_url)
    if store_url.startswith("sqlite"):
        fresh_url = f"sqlite:///{tmp_path / 'fresh.db'}"
        open_store(fresh_url).close()
        assert _shape(fresh_url) == upgraded
    else:
        from store_helpers import PgSchema

        fresh = PgSchema()
        fresh.create()
        try:
            open_store(fresh.url).close()
            assert _shape(fresh.url) == upgraded
        finally:
            fresh.drop()
    assert ("ix_events_hour", ("start_hour", "severity")) in upgraded["events"]["indexes"]


def test_a_newer_store_is_refused_with_a_clear_message(store_url: str) -> None:
    open_store(store_url).close()
    engine = _engine(store_url)
    with write_transaction(engine, "stamping a future version") as conn:
        conn.execute(schema.schema_version_table.insert().values(
            version=SCHEMA_VERSION + 5, applied_at=T0, description="from a later release"))
    engine.dispose()
    msg = rf"schema version {SCHEMA_VERSION + 5}, newer than version {SCHEMA_VERSION}.*refusing to open it"
    with pytest.raises(SchemaVersionError, match=msg):
        open_store(store_url)
    with pytest.raises(SchemaVersionError, match=msg):
        upgrade_store(store_url)


def test_store_tables_without_a_version_table_are_refused(store_url: str) -> None:
    engine = _engine(store_url)
    with write_transaction(engine, "making a foreign table") as conn:
        conn.execute(text("CREATE TABLE events (id INTEGER PRIMARY KEY, what TEXT)"))
    engine.dispose()
    with pytest.raises(SchemaVersionError, match="no leadline_schema_version table"):
        open_store(store_url)


def test_an_empty_version_table_is_refused(store_url: str) -> None:
    open_store(store_url).close()
    engine = _engine(store_url)
    with engine.connect() as conn:
        conn.execute(text("DELETE FROM leadline_schema_version"))
        conn.commit()
    engine.dispose()
    with pytest.raises(SchemaVersionError, match="schema version is unknown"):
        open_store(store_url)
