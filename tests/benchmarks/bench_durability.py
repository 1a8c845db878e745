"""What the journal costs: readings/s with the journal on against off, and bytes per journaled reading.

Run: ``python tests/benchmarks/bench_durability.py [--steps 20000]``

The same input (four seeded AR(1) feeds at 1-minute steps in one followed CSV
file, ``--steps`` readings each) goes through the service loop twice, into a
fresh SQLite store each time, the initial fits inline and no scheduled refit (so the rate is that of
the reading path): once with the journal and
snapshots (:mod:`leadline.adapters.service.durability`), once without. It
prints both rates and their ratio (one run each, so a ratio, not a timing
claim), and the bytes the journal takes per reading: the pages of the
``journal`` table and its index (SQLite's ``dbstat``), over the readings it
holds (no snapshot truncates it during the run).
"""

from __future__ import annotations

import argparse
import sqlite3
import sys
import tempfile
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

from leadline.adapters.service.durability import Durability
from leadline.adapters.service.loop import Service
from leadline.adapters.sources.csv_follow import CsvFollower
from leadline.adapters.sources.csv_rows import CsvLayout
from leadline.adapters.store import open_store
from leadline.detector.engine import Engine, FeedSettings
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec

T0 = datetime(2026, 5, 4, tzinfo=timezone.utc)
FEEDS = ("dunmoor/a/flow", "dunmoor/b/flow", "dunmoor/c/level", "dunmoor/d/level")


def write_input(path: Path, steps: int) -> int:
    series = [simulate_arima(steps, ar=[0.6], mean=10.0 + k, sigma=0.3, seed=40 + k) for k in range(len(FEEDS))]
    with path.open("w") as handle:
        handle.write("timestamp,feed,value\n")
        for i in range(steps):
            stamp = (T0 + timedelta(minutes=i)).isoformat()
            for feed, values in zip(FEEDS, series):
                handle.write(f"{stamp},{feed},{float(values[i])!r}\n")
    return steps * len(FEEDS)


def settings(feed_id: str) -> FeedSettings:
    return FeedSettings(spec=ModelSpec.ar(1), interval_s=60.0, train_points=300, min_train_points=200,
                        refit_every_s=None, threshold_mode="sigma", future_tolerance_s=None)


def one_run(csv: Path, db: Path, journal: bool) -> tuple[float, int]:
    store = open_store(f"sqlite:///{db}")
    durability = Durability(store, snapshot_interval_s=1e9, snapshot_every_readings=10**9) if journal else None
    service = Service(engine=Engine(settings), store=store,
                      sources=[CsvFollower("bench", str(csv), CsvLayout(), from_start=True)], refit_workers=0,
                      clock="readings", durability=durability, refit_install_delay_slots=10, batch_size=2000)
    t0 = time.perf_counter()
    service.run(until_idle=lambda: True)
    elapsed = time.perf_counter() - t0
    store.close()
    return elapsed, service.readings_total


def journal_bytes(db: Path) -> int:
    con = sqlite3.connect(db)
    try:
        con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        rows = con.execute("SELECT name, SUM(pgsize) FROM dbstat WHERE name IN ('journal', 'ix_journal_feed') "
                           "GROUP BY name").fetchall()
        count = con.execute("SELECT COUNT(*) FROM journal").fetchone()[0]
    finally:
        con.close()
    return sum(size for _, size in rows), count


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--steps", type=int, default=20_000)
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        csv = folder / "input.csv"
        n = write_input(csv, args.steps)
        off_s, off_n = one_run(csv, folder / "off.db", journal=False)
        on_s, on_n = one_run(csv, folder / "on.db", journal=True)
        size, rows = journal_bytes(folder / "on.db")
    print(f"readings: {n} ({len(FEEDS)} feeds x {args.steps}); processed off={off_n} on={on_n}")
    print(f"journal off: {off_n / off_s:,.0f} readings/s; journal on: {on_n / on_s:,.0f} readings/s; "
          f"on/off = {(on_n / on_s) / (off_n / off_s):.2f}")
    print(f"journal: {rows} rows, {size:,} bytes with its index = {size / max(rows, 1):.1f} bytes per reading")
    return 0


if __name__ == "__main__":
    sys.exit(main())
