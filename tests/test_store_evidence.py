"""Evidence records in the store, on SQLite and PostgreSQL: round trip, merging, upgrade."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
from sqlalchemy import inspect

from leadline.adapters.store import SCHEMA_VERSION, open_store, upgrade_store
from leadline.adapters.store import schema
from leadline.adapters.store.connect import create_store_engine, resolve_url, write_transaction
from leadline.adapters.store.evidence import pack, unpack
from leadline.adapters.store.migrations import create_schema
from leadline.detector.errors import SchemaVersionError, StoreError
from leadline.detector.events import AlarmEvent
from leadline.detector.evidence import record_from_arrays

from store_helpers import store_url  # noqa: F401 - fixture

UTC = timezone.utc
T0 = datetime(2026, 10, 20, 1, 15, 0, 250000, tzinfo=UTC)
FEED = "fenwick/dm-north/flow"


def make_record(n: int, complete: bool, start: datetime = T0, rule: str = "cusum", seed: int = 3):
    rng = np.random.default_rng(seed)
    epoch = start.timestamp() - 96 * 900 + 900.0 * np.arange(n)
    value = rng.normal(40.0, 3.0, n)
    value[n // 2] = np.nan  # a missing slot
    forecast = value + rng.normal(0, 1, n)
    end = start + timedelta(hours=2) if complete else None
    return record_from_arrays(FEED, rule, start, complete, epoch, value, forecast, forecast - 2.5, forecast + 2.5,
                              end=end, omitted_slots=7 if complete else 0)


def same(a, b) -> None:
    assert a.key == b.key and a.complete == b.complete and a.end == b.end and a.omitted_slots == b.omitted_slots
    assert np.array_equal(a.epoch_s, b.epoch_s)  # whole seconds after the base: exact in float32
    for name in ("value", "forecast", "lower", "upper"):
        assert np.array_equal(getattr(a, name), getattr(b, name), equal_nan=True)


def test_packing_is_exact_and_compact():
    rec = make_record(150, True)
    base, data = pack(rec)
    assert base == rec.epoch_s[0]
    assert len(data) < 0.8 * 20 * 150  # 20 bytes a slot before the shuffle and zlib
    back = unpack(base, data, 150)
    assert np.array_equal(back[0], rec.epoch_s)
    for got, want in zip(back[1:], (rec.value, rec.forecast, rec.lower, rec.upper)):
        assert got.dtype == np.float32 and np.array_equal(got, want, equal_nan=True)
    with pytest.raises(StoreError, match="expected 2980"):
        unpack(base, data, 149)
    with pytest.raises(StoreError, match="cannot be unpacked"):
        unpack(base, data[:-4], 150)


def test_round_trip_with_the_events_in_one_flush(store_url):
    ev = AlarmEvent(FEED, "cusum", "alarm", T0, peak_abs_z=5.5)
    with open_store(store_url) as store:
        store.stage_event(ev)
        store.stage_evidence(make_record(130, False))
        assert store.evidence([ev.key]) == {}  # staged only
        store.flush()
        got = store.evidence([ev.key, (FEED, "spike", T0)])
        assert list(got) == [ev.key]
        same(got[ev.key], make_record(130, False))
        assert len(store.events()) == 1


def test_a_complete_record_replaces_a_partial_one_and_is_never_replaced_by_one(store_url):
    with open_store(store_url) as store:
        store.stage_evidence(make_record(100, False))
        store.flush()
        store.stage_evidence(make_record(140, True))
        store.flush()
        store.stage_evidence(make_record(90, False, seed=9))  # a replay after a restart
        store.flush()
        (got,) = store.evidence([(FEED, "cusum", T0)]).values()
        same(got, make_record(140, True))
        # within one buffer too
        other = T0 + timedelta(days=1)
        store.stage_evidence(make_record(50, True, start=other))
        store.stage_evidence(make_record(20, False, start=other))
        store.flush()
        (got,) = store.evidence([(FEED, "cusum", other)]).values()
        assert got.complete and len(got) == 50


def test_many_keys_are_read_in_chunks(store_url):
    starts = [T0 + timedelta(minutes=15 * i) for i in range(450)]
    with open_store(store_url) as store:
        for i, s in enumerate(starts):
            store.stage_evidence(make_record(4 + i % 3, True, start=s, rule="spike" if i % 2 else "cusum"))
        store.flush()
        keys = [(FEED, "spike" if i % 2 else "cusum", s) for i, s in enumerate(starts)]
        got = store.evidence(keys + [(FEED, "flatline", starts[0])])
    assert set(got) == set(keys)
    assert [len(got[k]) for k in keys] == [4 + i % 3 for i in range(450)]


def test_a_version_2_store_is_upgraded_to_hold_evidence(store_url):
    engine = create_store_engine(resolve_url(store_url))
    with write_transaction(engine, "making a v2 store") as conn:
        create_schema(conn, version=2)
    engine.dispose()
    with pytest.raises(SchemaVersionError, match="schema version 2, older"):
        open_store(store_url)
    assert upgrade_store(store_url) == SCHEMA_VERSION >= 3
    engine = create_store_engine(resolve_url(store_url))
    with engine.connect() as conn:
        assert "evidence" in inspect(conn).get_table_names()
    engine.dispose()
    with open_store(store_url) as store:
        store.stage_evidence(make_record(10, True))
        store.flush()
        assert len(store.evidence([(FEED, "cusum", T0)])) == 1


def test_the_evidence_table_is_in_the_current_schema():
    assert "evidence" in schema.TABLE_NAMES
    assert {c.name for c in schema.evidence.primary_key.columns} == {"start_at", "feed_id", "rule"}
