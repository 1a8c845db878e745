"""Snapshot rounds at scale: only feeds with new readings, at most N per round, oldest first.

Real SQLite store, real engine feeds (AR(1), fitted by statsmodels through the engine).
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

from engine_helpers import ar1, settings

from leadline.adapters.service.durability import Durability
from leadline.adapters.store import open_store
from leadline.detector.engine import Engine, run_refit
from leadline.detector.readings import Reading

T0 = datetime(2026, 5, 4, tzinfo=timezone.utc)


def watched_engine(durability: Durability, feeds: list[str], readings: int) -> Engine:
    engine = Engine(lambda feed_id: settings())
    series = {f: ar1(readings, seed=i) for i, f in enumerate(feeds)}
    for k in range(readings):
        for f in feeds:
            reading = Reading(f, T0 + timedelta(minutes=k), float(series[f][k]))
            durability.journal(reading)
            out = engine.process(reading)
            for request in out.refit_requests:
                engine.install_model(f, run_refit(request), 1, request.reason, request=request)
    return engine


def snapshotted(store) -> dict[str, int]:
    return {feed: seq for feed, (seq, _, _) in store.open_journal().snapshots.items()}


def test_a_round_takes_at_most_n_feeds_oldest_first_and_skips_feeds_with_no_new_reading(tmp_path):
    store = open_store(str(tmp_path / "s.db"))
    durability = Durability(store, snapshot_max_feeds=2)
    durability.recover(Engine(lambda feed_id: settings()))  # opens the journal, as the service does at start
    feeds = ["a", "b", "c"]
    engine = watched_engine(durability, feeds, 320)
    assert all(engine.snapshot_ready(f) for f in feeds)

    assert durability.stage_snapshots(engine) == 2  # the cap
    store.flush()
    first = snapshotted(store)
    assert len(first) == 2
    assert durability.stage_snapshots(engine) == 1  # the one left out, the two others have nothing new
    store.flush()
    assert set(snapshotted(store)) == set(feeds)
    assert durability.stage_snapshots(engine) == 0  # no new readings anywhere: nothing to write

    # one new reading for "a": only "a" is due
    reading = Reading("a", T0 + timedelta(minutes=320), 40.0)
    durability.journal(reading)
    engine.process(reading)
    assert durability.stage_snapshots(engine) == 1
    store.flush()
    assert snapshotted(store)["a"] > first.get("a", -1)
    # at shutdown, and after an operator's accept, every ready feed regardless
    assert durability.stage_snapshots(engine, all_feeds=True, force=True) == 3
    store.close()
