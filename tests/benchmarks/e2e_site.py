"""The service side of bench_end_to_end.py: config, the ``leadline run`` process, the store probe, CPU.

* :func:`write_config`: the benchmark's TOML (settings chosen in
  bench_end_to_end.py's docstring).
* :class:`ServiceProcess`: ``python -m leadline run --config ... --summary-interval S``
  with its standard error in a log file that the benchmark tails for
  ``store time`` lines (:mod:`leadline.adapters.store.timing`).
* :class:`StoreProbe`: reads the store the service writes, from another
  connection: readings journaled (committed), feeds watching, spike events.
* :class:`PgDatabase`: a throw-away PostgreSQL database, dropped afterwards.
* :func:`cpu_seconds`: user + system CPU of processes, from ``/proc``.
"""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time
import uuid
from datetime import datetime, timezone
from pathlib import Path

from e2e_clients import FEED_TEMPLATE, TOPIC_PATTERN

CONFIG = """\
[store]
url = "{url}"
flush_interval_s = 1.0
snapshot_interval_s = {snapshot_interval_s}

[[sources.mqtt]]
name = "e2e-broker"
host = "127.0.0.1"
port = {port}
client_id = "leadline-e2e"
protocol = "5"
topics = [{{ pattern = "{pattern}", feed = "{feed}", payload = "json", value_path = "v", time_path = "t", \
time_format = "epoch_s" }}]

[feeds.defaults]
interval = "1min"
train_points = {train_points}
model = {{ order = [0, 0, 0], trend = "c" }}
threshold_mode = "sigma"
stale_intervals = 1000000

[refit]
every = "3650d"
on_degraded = false
workers = 1
install_delay_slots = 0
"""

STORE_TIME = re.compile(r"store time (.*)$")


def write_config(path: Path, *, url: str, port: int, train_points: int, snapshot_interval_s: float) -> Path:
    path.write_text(CONFIG.format(url=url, port=port, pattern=TOPIC_PATTERN, feed=FEED_TEMPLATE,
                                  train_points=train_points, snapshot_interval_s=snapshot_interval_s))
    return path


def parse_store_time(line: str) -> dict[str, float] | None:
    """The fields of a ``store time`` log line, or None for another line."""
    match = STORE_TIME.search(line)
    if match is None:
        return None
    return {k: float(v) for k, v in (kv.split("=", 1) for kv in match.group(1).split())}


class ServiceProcess:
    """The real ``leadline run`` as a subprocess, its log tailed line by line."""

    def __init__(self, config: Path, log: Path, summary_interval_s: float) -> None:
        self.config, self.log = config, log
        self.summary_interval_s = summary_interval_s
        self.process: subprocess.Popen | None = None
        self._offset = 0
        self._partial = b""

    def start(self, timeout_s: float = 60.0) -> None:
        with self.log.open("ab") as out:
            self.process = subprocess.Popen(
                [sys.executable, "-m", "leadline", "run", "--config", str(self.config),
                 "--summary-interval", str(self.summary_interval_s)],
                stdout=out, stderr=subprocess.STDOUT, env={**os.environ, "PYTHONUNBUFFERED": "1"})
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if any("subscribing to" in line for line in self.new_lines()):
                time.sleep(0.5)  # the SUBSCRIBE is on its way; let the broker take it
                return
            if self.process.poll() is not None:
                raise RuntimeError(f"leadline run exited with {self.process.returncode}:\n{self.tail()}")
            time.sleep(0.05)
        raise TimeoutError(f"leadline run did not subscribe within {timeout_s:g} s:\n{self.tail()}")

    @property
    def pid(self) -> int:
        assert self.process is not None
        return self.process.pid

    def new_lines(self) -> list[str]:
        """Complete log lines written since the last call."""
        with self.log.open("rb") as handle:
            handle.seek(self._offset)
            data = handle.read()
        self._offset += len(data)
        data = self._partial + data
        *lines, self._partial = data.split(b"\n")
        return [line.decode(errors="replace") for line in lines]

    def tail(self, chars: int = 3000) -> str:
        return self.log.read_text(errors="replace")[-chars:]

    def alive(self) -> bool:
        return self.process is not None and self.process.poll() is None

    def stop(self, timeout_s: float = 180.0) -> int:
        """SIGTERM (drain, snapshots, last commit), then wait; SIGKILL after ``timeout_s``."""
        if self.process is None:
            return 0
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=30)
        return self.process.returncode


class StoreProbe:
    """Reads of the service's store from a connection of its own (SQLite WAL readers do not block it)."""

    def __init__(self, url: str) -> None:
        from leadline.adapters.store import schema
        from leadline.adapters.store.connect import create_store_engine, resolve_url

        self._schema = schema
        self._engine = create_store_engine(resolve_url(url))

    def _scalar(self, statement) -> int:
        with self._engine.connect() as conn:
            value = conn.execute(statement).scalar()
        return int(value or 0)

    def journaled(self) -> int:
        """Readings committed to the journal, all feeds (each reading once: repeats are not journaled)."""
        from sqlalchemy import func, select

        jf = self._schema.metadata.tables["journal_feeds"]
        return self._scalar(select(func.sum(jf.c.journaled)))

    def watching(self) -> int:
        from sqlalchemy import func, select

        fs = self._schema.feed_status
        return self._scalar(select(func.count()).select_from(fs).where(fs.c.state == "watching"))

    def spike_starts(self, feed_ids: list[str]) -> set[tuple[str, float]]:
        """(feed, start epoch s) of the committed ``spike`` events of these feeds."""
        from sqlalchemy import select

        ev = self._schema.events
        with self._engine.connect() as conn:
            rows = conn.execute(select(ev.c.feed_id, ev.c.start_at).where(ev.c.rule == "spike",
                                                                          ev.c.feed_id.in_(feed_ids))).all()
        return {(f, s.timestamp()) for f, s in rows}

    def close(self) -> None:
        self._engine.dispose()


class PgDatabase:
    """``CREATE DATABASE`` of a fresh name on the local server; :meth:`drop` removes it."""

    def __init__(self, server_url: str = "postgresql+psycopg://postgres@127.0.0.1:5432/postgres") -> None:
        from sqlalchemy.engine import make_url

        self.server = make_url(server_url)
        self.name = f"leadline_e2e_{uuid.uuid4().hex[:10]}"
        self.url = self.server.set(database=self.name).render_as_string(hide_password=False)

    def _admin(self, sql: str) -> None:
        import psycopg

        libpq = self.server.set(drivername="postgresql").render_as_string(hide_password=False)
        with psycopg.connect(libpq, autocommit=True, connect_timeout=5) as conn:
            conn.execute(sql)

    def create(self) -> "PgDatabase":
        self._admin(f'CREATE DATABASE "{self.name}"')
        return self

    def drop(self) -> None:
        self._admin(f'DROP DATABASE IF EXISTS "{self.name}" WITH (FORCE)')


def pg_reachable(server_url: str = "postgresql+psycopg://postgres@127.0.0.1:5432/postgres") -> str | None:
    """None when the local PostgreSQL answers, else why not."""
    try:
        PgDatabase(server_url)._admin("SELECT 1")
    except Exception as exc:  # noqa: BLE001 - any failure means "not reachable"
        return f"{type(exc).__name__}: {exc}"
    return None


_TICK = os.sysconf("SC_CLK_TCK")


def cpu_seconds(pids: list[int]) -> float:
    """User + system CPU seconds of these processes so far (gone ones count 0)."""
    total = 0
    for pid in pids:
        try:
            fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        total += int(fields[11]) + int(fields[12])  # utime, stime (fields 14 and 15 of stat(5))
    return total / _TICK


def pids_named(name: str) -> list[int]:
    """Processes whose command name is ``name`` (every PostgreSQL server process, whoever it serves)."""
    found = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                if (entry / "comm").read_text().strip() == name:
                    found.append(int(entry.name))
            except OSError:
                continue
    return found


def machine_busy_s() -> tuple[float, float]:
    """(busy, total) CPU seconds of the whole machine so far, all cores (``/proc/stat``)."""
    values = [int(x) for x in Path("/proc/stat").read_text().splitlines()[0].split()[1:]]
    idle = values[3] + values[4]
    return (sum(values) - idle) / _TICK, sum(values) / _TICK


def utc_now_s() -> int:
    return int(datetime.now(timezone.utc).timestamp())
