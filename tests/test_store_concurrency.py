"""One process writes events continuously while this one reads and acknowledges.

On SQLite this is what WAL mode, ``busy_timeout`` and ``BEGIN IMMEDIATE``
write transactions are for (SQLite docs, "Write-Ahead Logging": readers do
not block writers and a writer does not block readers; one writer at a
time). Neither side may see "database is locked", and every event written
must be read back.
"""

from __future__ import annotations

import subprocess
import time

from leadline.adapters.store import open_store

from store_helpers import concurrent_key, helper_command, helper_env, store_url  # noqa: F401 - fixture

N_EVENTS = 4000


def test_writer_and_acknowledging_reader_run_side_by_side(store_url: str) -> None:
    reader = open_store(store_url, busy_timeout_s=10.0)  # creates the schema first
    proc = subprocess.Popen(
        helper_command("concurrent-writer", store_url, str(N_EVENTS)),
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=helper_env(),
    )
    acked: set[int] = set()
    acks_while_writing = 0
    reads = 0
    try:
        deadline = time.monotonic() + 120
        while proc.poll() is None and time.monotonic() < deadline:
            batch = reader.events(unacked=True, limit=25)
            reads += 1
            for row in batch:
                reader.add_note(row.id, "ack", "operator-k", "seen during the test")
                acked.add(row.id)
                if proc.poll() is None:
                    acks_while_writing += 1
            reader.alarm_counts_per_feed(concurrent_key(0)[2], concurrent_key(N_EVENTS)[2])
            time.sleep(0.005)  # a busy review screen, not a spin loop hogging both cores
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, err
    assert "database is locked" not in err
    assert out.strip() == f"done {N_EVENTS}"
    assert acks_while_writing > 0 and reads > 1, "the reader never overlapped the writer"

    # every event written is there exactly once; every acknowledgement too
    rows = reader.events()
    assert sorted(r.event.key for r in rows) == sorted(concurrent_key(i) for i in range(N_EVENTS))
    assert {r.id for r in rows if r.acknowledged} == acked
    assert all(sum(n.kind == "ack" for n in r.notes) == (r.id in acked) for r in rows)
    assert len(reader.events(unacked=True)) == N_EVENTS - len(acked)
    reader.close()
