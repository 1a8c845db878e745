"""SIGKILL a writer at random moments; nothing whose flush returned may be lost.

The writer (``store_helpers.py crash-writer``) follows a simulated CSV file:
row i opens episode i and clears episode i - 1, and the file offset past
row i and a checkpoint are staged with those events. After each flush that
returned it journals the last flushed row. After every kill we check:

- every journaled row's event is stored (a returned flush is durable);
- the stored events are exactly rows 0..M, each once (no gap, no duplicate);
- the committed offset never runs ahead of the committed events, and the
  checkpoint of the last covered row was committed with it;
- every row covered by the offset, but the last, has its clearing copy;
- the reject sample stays within its bound.

Why SQLite with ``synchronous=NORMAL`` must pass: "Transactions are durable
across application crashes regardless of the synchronous setting or journal
mode" (SQLite documentation, PRAGMA synchronous, sqlite.org/pragma.html);
only a power loss or OS crash may roll back the last WAL commits, which a
SIGKILL is not. PostgreSQL: a commit that returned is in its WAL.
"""

from __future__ import annotations

import os
import random
import select
import signal
import subprocess
import time
from collections import Counter
from pathlib import Path

import pytest
from sqlalchemy import func, select as sql_select

from leadline.adapters.store import open_store
from leadline.adapters.store import schema
from leadline.adapters.store.writer import REJECT_SAMPLE_LIMIT

from store_helpers import (  # noqa: F401 - store_url is a fixture
    CRASH_PATH,
    CRASH_SOURCE,
    ROW_BYTES,
    crash_key,
    crash_row_of,
    helper_command,
    helper_env,
    store_url,
)


def _wait_ready(proc: subprocess.Popen, timeout_s: float) -> bool:
    ready, _, _ = select.select([proc.stdout], [], [], timeout_s)
    if not ready:
        return False
    line = proc.stdout.readline()
    return line.startswith(b"ready")


def _check(url: str, journal: Path) -> tuple[int, int]:
    """All invariants after a kill; returns (offset row, rows stored)."""
    with open_store(url) as store:
        ev = schema.events
        with store.engine.connect() as conn:
            rows = conn.execute(sql_select(ev.c.feed_id, ev.c.rule, ev.c.start_at, ev.c.end_at)).all()
            dup = conn.execute(
                sql_select(func.count()).select_from(
                    sql_select(ev.c.feed_id).group_by(ev.c.feed_id, ev.c.rule, ev.c.start_at)
                    .having(func.count() > 1).subquery()
                )
            ).scalar()
            sample_n = conn.execute(sql_select(func.count()).select_from(schema.reject_samples)).scalar()
        offsets = store.load_offsets(CRASH_SOURCE)
        checkpoints = store.load_checkpoints()

    assert dup == 0
    stored = Counter(crash_row_of(r.start_at) for r in rows)
    assert all(c == 1 for c in stored.values())
    for r in rows:
        assert (r.feed_id, r.rule, r.start_at) == crash_key(crash_row_of(r.start_at))
    n = len(stored)
    assert set(stored) == set(range(n)), "a gap in the committed rows"

    journaled = [int(x) for x in journal.read_text().split()] if journal.exists() else []
    if journaled:
        assert max(journaled) < n, f"row {max(journaled)} was flushed (journaled) but is missing"

    off = offsets.get(CRASH_PATH)
    covered = 0 if off is None else off.offset_bytes // ROW_BYTES
    assert covered <= n, f"offset covers {covered} rows but only {n} are stored"
    if covered:
        assert off.offset_bytes == covered * ROW_BYTES
        assert off.inode == 1 << 63
        last = covered - 1
        state, version = checkpoints[crash_key(last)[0]]
        assert int(state) == last and version == 1, "checkpoint not committed with its offset"
        ends = {crash_row_of(r.start_at): r.end_at for r in rows}
        assert all(ends[i] is not None for i in range(last)), "a clearing copy before the offset is missing"
    assert sample_n <= REJECT_SAMPLE_LIMIT
    return covered, n


def _run_kills(url: str, tmp_path: Path, kills: int, seed: int) -> list[tuple[int, int]]:
    rng = random.Random(seed)
    journal = tmp_path / "journal.txt"
    open_store(url).close()  # the schema exists before the first kill
    history = []
    for k in range(kills):
        proc = subprocess.Popen(
            helper_command("crash-writer", url, str(journal), str(seed * 1000 + k)),
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=helper_env(),
        )
        try:
            if k % 5 == 4:
                # now and then, kill while it is still starting (opening the store)
                time.sleep(rng.uniform(0.0, 0.6))
            else:
                assert _wait_ready(proc, 30.0), proc.stderr.read().decode()
                time.sleep(rng.uniform(0.0, 0.35))
            if proc.poll() is not None:
                pytest.fail(f"the writer ended before the kill: {proc.stderr.read().decode()}")
            os.kill(proc.pid, signal.SIGKILL)
        finally:
            proc.wait(timeout=30)
            proc.stdout.close()
            proc.stderr.close()
        assert proc.returncode == -signal.SIGKILL
        history.append(_check(url, journal))
    return history


def _assert_progress(history: list[tuple[int, int]], kills: int) -> None:
    offsets = [h[0] for h in history]
    assert max(offsets) > 0, "the writer never committed anything"
    # the store grows across restarts (the writer resumes, it does not start over)
    assert history[-1][1] >= max(h[1] for h in history)
    assert len(history) == kills


def test_sigkill_smoke(store_url: str, tmp_path: Path) -> None:
    """Three kills, in the default run."""
    history = _run_kills(store_url, tmp_path, kills=3, seed=7)
    _assert_progress(history, 3)


@pytest.mark.slow
def test_sigkill_at_random_moments_24_times(store_url: str, tmp_path: Path) -> None:
    history = _run_kills(store_url, tmp_path, kills=24, seed=2026)
    _assert_progress(history, 24)
    assert sum(1 for a, b in zip(history, history[1:]) if b[1] > a[1]) >= 10, "too few kills after progress"
