"""Test support for the event store: database fixtures and helper processes.

Fixtures
--------
``store_url``
    Parametrised over ``sqlite`` (a file in ``tmp_path``) and ``postgres``
    (a fresh schema of its own on the server named by ``LEADLINE_TEST_PG_URL``,
    default ``postgresql+psycopg://postgres@127.0.0.1:5432/test``, dropped
    afterwards). The postgres case skips, with the reason, only when no
    server answers.

Helper processes (run as ``python tests/store_helpers.py MODE ...``)
--------------------------------------------------------------------
``crash-writer URL JOURNAL SEED``
    Simulates the service loop over a followed CSV file of fixed-width rows:
    each row opens one episode and closes the previous one; the file offset
    and a checkpoint are staged with the row's events, so they commit
    together. After every flush that returned, the last flushed row is
    appended to JOURNAL. Resumes from the committed offset (rewinding a few
    rows, as a replay would). Runs until killed.
``concurrent-writer URL N``
    Writes N events in small batches, flat out, then prints ``done N``.
"""

from __future__ import annotations

import os
import random
import sys
import time
import uuid
from datetime import datetime, timedelta, timezone
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
HELPER = Path(__file__).resolve()

DEFAULT_PG_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"

#: Crash simulation: every CSV row is this many bytes, so offset = rows * ROW_BYTES.
ROW_BYTES = 32
CRASH_SOURCE = "crash-csv"
CRASH_PATH = "/data/millbrook/flow.csv"
CRASH_FEEDS = 4
#: Row i opens an episode starting at CRASH_BASE + i s (on the EU summer-time change day).
CRASH_BASE = datetime(2026, 3, 29, 0, 0, tzinfo=timezone.utc)


def pg_base_url() -> str:
    return os.environ.get("LEADLINE_TEST_PG_URL", DEFAULT_PG_URL)


def _libpq(url: str) -> str:
    from sqlalchemy.engine import make_url

    return make_url(url).set(drivername="postgresql").render_as_string(hide_password=False)


_PG_STATE: dict[str, str | None] = {}


def pg_unreachable_reason() -> str | None:
    """None if the test server answers, else why not (cached per run)."""
    base = pg_base_url()
    if base not in _PG_STATE:
        import psycopg

        try:
            with psycopg.connect(_libpq(base), connect_timeout=3) as conn:
                conn.execute("SELECT 1")
            _PG_STATE[base] = None
        except Exception as exc:  # noqa: BLE001 - any failure means "not reachable"
            from sqlalchemy.engine import make_url

            shown = make_url(base).render_as_string(hide_password=True)
            _PG_STATE[base] = f"PostgreSQL at {shown} not reachable ({type(exc).__name__}: {exc})"
    return _PG_STATE[base]


def with_search_path(url: str, schema_name: str) -> str:
    """The URL with ``options=-csearch_path=schema`` (psycopg passes it to libpq)."""
    sep = "&" if "?" in url else "?"
    return f"{url}{sep}options=-csearch_path%3D{schema_name}"


class PgSchema:
    """A throw-away PostgreSQL schema, so parallel or repeated runs never collide."""

    def __init__(self) -> None:
        self.name = f"ll_test_{uuid.uuid4().hex[:12]}"
        self.url = with_search_path(pg_base_url(), self.name)

    def create(self) -> None:
        import psycopg

        with psycopg.connect(_libpq(pg_base_url()), autocommit=True) as conn:
            conn.execute(f'CREATE SCHEMA "{self.name}"')

    def drop(self) -> None:
        import psycopg

        with psycopg.connect(_libpq(pg_base_url()), autocommit=True) as conn:
            conn.execute(f'DROP SCHEMA IF EXISTS "{self.name}" CASCADE')


if __name__ != "__main__":  # the helper processes skip importing pytest (startup time)
    import pytest

    @pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
    def store_url(request: pytest.FixtureRequest, tmp_path: Path):
        """A URL of an empty database on each backend."""
        if request.param == "sqlite":
            yield f"sqlite:///{tmp_path / 'events.db'}"
            return
        reason = pg_unreachable_reason()
        if reason:
            pytest.skip(reason)
        schema = PgSchema()
        schema.create()
        try:
            yield schema.url
        finally:
            schema.drop()


def helper_command(*args: str) -> list[str]:
    return [sys.executable, str(HELPER), *args]


def helper_env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO / "tests"), env.get("PYTHONPATH", "")]))
    return env


# --------------------------------------------------------------- crash writer
def crash_key(row: int) -> tuple[str, str, datetime]:
    return (f"crash/f{row % CRASH_FEEDS}", "spike", CRASH_BASE + timedelta(seconds=row))


def crash_row_of(start: datetime) -> int:
    return int((start - CRASH_BASE).total_seconds())


def _crash_writer(url: str, journal: str, seed: int) -> int:
    from leadline.adapters.ports import RejectSample, SourceOffset
    from leadline.adapters.store import open_store
    from leadline.detector.events import AlarmEvent

    rng = random.Random(seed)
    store = open_store(url, flush_interval_s=0.01, max_staged_events=rng.choice([5, 20, 60]))
    off = store.load_offsets(CRASH_SOURCE).get(CRASH_PATH)
    committed = 0 if off is None else off.offset_bytes // ROW_BYTES
    row = max(0, committed - rng.randint(0, 5))  # replay a few rows, as after a crash
    print(f"ready {row}", flush=True)
    out = open(journal, "a", buffering=1)  # line-buffered: each line reaches the OS at once
    deadline = time.monotonic() + 60.0
    while time.monotonic() < deadline:
        for _ in range(rng.randint(1, 25)):
            feed, rule, start = crash_key(row)
            store.stage_event(
                AlarmEvent(feed, rule, "warning", start, peak_abs_z=4.0 + row % 3, value_at_onset=float(row),
                           parameters={"limit": 4.0}, model_version=1, detail=f"row {row}")
            )
            if row > 0:
                pfeed, prule, pstart = crash_key(row - 1)
                store.stage_event(
                    AlarmEvent(pfeed, prule, "alarm", pstart, end=pstart + timedelta(seconds=30),
                               peak_abs_z=9.0, value_at_onset=float(row - 1), parameters={"limit": 4.0},
                               model_version=1, detail=f"row {row - 1} cleared")
                )
            if row % 7 == 0:
                store.stage_reject(RejectSample(CRASH_SOURCE, "non_numeric", f"{CRASH_PATH}:{row}",
                                                "value is not a number", b"x,abc\n",
                                                CRASH_BASE + timedelta(seconds=row)))
            store.stage_checkpoint(feed, f"{row}".encode(), 1)
            store.stage_offset(SourceOffset(CRASH_SOURCE, CRASH_PATH, 2049, 1 << 63, (row + 1) * ROW_BYTES,
                                            CRASH_BASE + timedelta(seconds=row)))
            row += 1
        if store.flush_due():
            store.flush()
            out.write(f"{row - 1}\n")
        time.sleep(rng.uniform(0.0, 0.004))
    store.close()
    return 0


# ---------------------------------------------------------- concurrent writer
CONCURRENT_BASE = datetime(2026, 3, 28, 22, 0, tzinfo=timezone.utc)


def concurrent_key(i: int) -> tuple[str, str, datetime]:
    return (f"eastfield/pressure/p{i % 5}", "cusum", CONCURRENT_BASE + timedelta(seconds=i))


def _concurrent_writer(url: str, n: int) -> int:
    from leadline.adapters.store import open_store
    from leadline.detector.events import AlarmEvent

    store = open_store(url)
    batch = 40
    for i0 in range(0, n, batch):
        for i in range(i0, min(n, i0 + batch)):
            feed, rule, start = concurrent_key(i)
            store.stage_event(AlarmEvent(feed, rule, "alarm", start, peak_abs_z=6.5, detail=f"event {i}"))
        store.flush()
        time.sleep(0.002)
    store.close()
    print(f"done {n}", flush=True)
    return 0


def main(argv: list[str]) -> int:
    mode = argv[1]
    if mode == "crash-writer":
        return _crash_writer(argv[2], argv[3], int(argv[4]))
    if mode == "concurrent-writer":
        return _concurrent_writer(argv[2], int(argv[3]))
    raise SystemExit(f"unknown mode {mode!r}")


if __name__ == "__main__":
    sys.exit(main(sys.argv))
