"""Storage cost of the evidence kept with each incident, and the recorder's cost per slot.

Run: ``python tests/benchmarks/bench_evidence.py [--records 2000] [--no-postgres]``

Writes ``--records`` evidence records of a typical episode (96 slots before the onset, 12 in the
episode, 24 after: 132 slots) through ``stage_evidence`` + ``flush`` into a fresh store, and prints
the bytes each record adds: on SQLite the file growth (journal_mode DELETE, after VACUUM), on
PostgreSQL ``pg_total_relation_size('evidence')`` (table, TOAST and the key index). Then times the
recorder on one feed, a slot at a time.
"""

from __future__ import annotations

import argparse
import os
import sqlite3
import sys
import tempfile
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
from sqlalchemy import text

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/ for store_helpers

from leadline.adapters.store import open_store  # noqa: E402
from leadline.detector.evidence import EvidenceRecorder, record_from_arrays  # noqa: E402
from store_helpers import PgSchema, pg_unreachable_reason  # noqa: E402

T0 = datetime(2026, 10, 1, tzinfo=timezone.utc)
SLOTS = 96 + 12 + 24


def records(n: int):
    rng = np.random.default_rng(7)
    for i in range(n):
        start = T0 + timedelta(minutes=15 * i)
        epoch = start.timestamp() + 900.0 * (np.arange(SLOTS) - 96)
        f = 40 + 10 * np.sin(epoch / 86400 * 2 * np.pi)
        v = f + rng.normal(0, 1, SLOTS)
        yield record_from_arrays(f"bench/feed-{i % 50:02d}", "cusum", start, True, epoch, v, f, f - 2, f + 2,
                                 end=start + timedelta(hours=3))


def fill(url: str, n: int) -> None:
    with open_store(url) as store:
        for i, rec in enumerate(records(n)):
            store.stage_evidence(rec)
            if i % 500 == 499:
                store.flush()
        store.flush()


def sqlite_cost(n: int) -> float:
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "ev.db"
        open_store(f"sqlite:///{path}").close()

        def size() -> int:
            con = sqlite3.connect(path)
            con.execute("PRAGMA journal_mode=DELETE")
            con.execute("VACUUM")
            con.close()
            return os.path.getsize(path)

        before = size()
        fill(f"sqlite:///{path}", n)
        return (size() - before) / n


def postgres_cost(n: int) -> float:
    schema = PgSchema()
    schema.create()
    try:
        fill(schema.url, n)
        with open_store(schema.url) as store, store.engine.connect() as conn:
            total = conn.execute(text("SELECT pg_total_relation_size('evidence')")).scalar()
        return total / n
    finally:
        schema.drop()


def recorder_cost_us(slots: int = 200_000) -> float:
    rec = EvidenceRecorder()
    t0 = T0.timestamp()
    start = time.perf_counter()
    for i in range(slots):
        rec.slot("bench/feed", t0 + 900.0 * i, 1.0, 1.0, 0.0, 2.0)
    return (time.perf_counter() - start) / slots * 1e6


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--records", type=int, default=2000)
    parser.add_argument("--no-postgres", action="store_true")
    args = parser.parse_args()
    print(f"evidence record: {SLOTS} slots, packed data {20 * SLOTS} bytes")
    print(f"SQLite: {sqlite_cost(args.records):.0f} bytes per record ({args.records} records)")
    if not args.no_postgres:
        reason = pg_unreachable_reason()
        if reason:
            print(f"PostgreSQL skipped: {reason}")
        else:
            print(f"PostgreSQL: {postgres_cost(args.records):.0f} bytes per record ({args.records} records)")
    print(f"recorder: {recorder_cost_us():.2f} us per slot (one feed, no open episode)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
