"""The journal of accepted readings and its snapshots, on real SQLite and PostgreSQL stores."""

from __future__ import annotations

import math

import pytest

from store_helpers import store_url  # noqa: F401 - fixture

from leadline.adapters.store import open_store
from leadline.detector.errors import StoreError


@pytest.fixture()
def url(store_url):  # noqa: F811 - each test runs on SQLite and on PostgreSQL
    return store_url


def test_rows_commit_with_the_flush_and_nothing_before_it(url):
    store = open_store(url)
    try:
        assert store.stage_reading("fenwick/a", 60.0, 1.5) == 1
        assert store.stage_reading("fenwick/b", 60.0, math.nan) == 2
        other = open_store(url)
        assert other.journal_counts() == {}  # staged is not committed
        store.flush()
        assert other.journal_counts() == {"fenwick/a": 1, "fenwick/b": 1}
        other.close()
    finally:
        store.close()
    reopened = open_store(url)
    state = reopened.open_journal()
    assert state.next_seq == 3
    assert [r[:3] for r in state.rows] == [(1, "fenwick/a", 60.0), (2, "fenwick/b", 60.0)]
    assert state.rows[0][3] == 1.5 and math.isnan(state.rows[1][3])
    reopened.close()


def test_truncation_lags_one_snapshot_and_counts_survive_it(url):
    store = open_store(url)
    seqs = [store.stage_reading("fenwick/a", 60.0 * i, float(i)) for i in range(10)]
    store.stage_snapshot("fenwick/a", seqs[3], b"first", 1)
    store.flush()
    store.stage_snapshot("fenwick/a", seqs[7], b"second", 2)
    store.flush()
    state = store.open_journal()
    # rows up to the first snapshot's position are gone, the rest are kept
    assert [r[0] for r in state.rows] == seqs[4:]
    assert state.snapshots == {"fenwick/a": (seqs[7], 2, b"second")}
    assert store.journal_counts() == {"fenwick/a": 10}
    # positions go on after the largest one ever used, even when its rows were truncated
    assert state.next_seq == seqs[-1] + 1
    store.close()


def test_a_snapshot_needs_a_journaled_feed(url):
    store = open_store(url)
    try:
        with pytest.raises(StoreError, match="no journaled reading"):
            store.stage_snapshot("fenwick/none", 1, b"x", 1)
    finally:
        store.close()


def test_the_latest_reading_time_per_feed_outlives_truncation(url):
    store = open_store(url)
    seqs = [store.stage_reading("fenwick/a", t, 1.0) for t in (120.0, 60.0, 180.0)]
    store.stage_snapshot("fenwick/a", seqs[-1], b"s1", 1)
    store.flush()
    store.stage_reading("fenwick/a", 30.0, 1.0)  # a late one does not move it back
    store.stage_snapshot("fenwick/a", seqs[-1] + 1, b"s2", 1)
    store.flush()
    store.stage_snapshot("fenwick/a", seqs[-1] + 1, b"s3", 1)
    store.flush()
    state = store.open_journal()
    assert state.rows == []  # everything covered by the previous snapshot is gone
    assert state.last_t == {"fenwick/a": 180.0}
    store.close()
