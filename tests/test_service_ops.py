"""The service as an operating-system service: exit statuses, sd_notify, store backoff, file modes.

Exit statuses are those of BSD ``sysexits.h`` (EX_USAGE 64, EX_TEMPFAIL 75, EX_CONFIG 78). The
notification messages and the ``@`` abstract-namespace convention are those of sd_notify(3); the
socket is a real Unix datagram socket. The store runs on a real SQLite file, made unavailable by a
second connection holding SQLite's exclusive lock (SQLite documentation, "File Locking And
Concurrency In SQLite Version 3", section 3).
"""

from __future__ import annotations

import logging
import os
import signal
import socket
import sqlite3
import stat
import subprocess
import sys
import time
from pathlib import Path

import pytest

from leadline.adapters.service.backoff import Backoff
from leadline.adapters.config import config_from_text
from leadline.adapters.cli.exit_codes import EX_CONFIG, EX_TEMPFAIL, EX_USAGE
from leadline.adapters.service.sd_notify import Notifier, send, watchdog_interval_s
from leadline.adapters.service import Service
from leadline.adapters.service.startup import plaintext_credential_warnings
from leadline.adapters.config.state_dir import default_store_path
from leadline.adapters.store.eventstore import open_store

REPO = Path(__file__).resolve().parents[1]


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _datagram_socket(address: str) -> socket.socket:
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(address)
    sock.settimeout(60)  # a loaded machine takes a while to import and start
    return sock


# ------------------------------------------------------------------------------ sd_notify
def test_notify_reaches_a_path_socket_and_an_abstract_one(tmp_path):
    path = str(tmp_path / "notify")
    with _datagram_socket(path) as sock:
        assert send("READY=1\nSTATUS=ok", {"NOTIFY_SOCKET": path})
        assert sock.recv(4096) == b"READY=1\nSTATUS=ok"
    name = f"leadline-test-{os.getpid()}"
    with _datagram_socket("\0" + name) as sock:
        notifier = Notifier({"NOTIFY_SOCKET": "@" + name})
        assert notifier.ready("running; 2 sources") and notifier.status("12 readings/s\nfeeds \x1b[31m")
        assert sock.recv(4096) == b"READY=1\nSTATUS=running; 2 sources"
        assert sock.recv(4096) == b"STATUS=12 readings/s feeds \\x1b[31m"  # one line, escaped
    assert not send("READY=1", {}) and not send("READY=1", {"NOTIFY_SOCKET": "relative/path"})


def test_watchdog_pings_every_half_interval(tmp_path):
    path = str(tmp_path / "notify")
    assert watchdog_interval_s({"WATCHDOG_USEC": "120000000"}) == 60.0
    assert watchdog_interval_s({"WATCHDOG_USEC": "120000000", "WATCHDOG_PID": "1"}) is None  # another process
    assert watchdog_interval_s({}) is None
    now = [1000.0]
    with _datagram_socket(path) as sock:
        notifier = Notifier({"NOTIFY_SOCKET": path, "WATCHDOG_USEC": "10000000"}, clock=lambda: now[0])
        sent = []
        for step in range(41):  # 20 s in 0.5 s steps: a ping at 0, 5, 10, 15 and 20 s
            now[0] = 1000.0 + 0.5 * step
            sent.append(notifier.heartbeat())
        assert sum(sent) == 5
        assert [sock.recv(64) for _ in range(5)] == [b"WATCHDOG=1"] * 5


# ------------------------------------------------------------------------------ store backoff
def test_backoff_doubles_to_its_cap_and_reports_outages_once():
    now = [0.0]
    backoff = Backoff(1.0, 8.0, clock=lambda: now[0])
    assert backoff.ready() and not backoff.down
    firsts, waits = [], []
    for _ in range(6):
        firsts.append(backoff.failed())
        waits.append(backoff.delay_s())
        assert not backoff.ready()
        now[0] = backoff.next_try
        assert backoff.ready()
    assert firsts == [True, False, False, False, False, False]
    assert waits == [1.0, 2.0, 4.0, 8.0, 8.0, 8.0]
    assert backoff.succeeded() == pytest.approx(sum(waits))  # the outage ran from the first failure to now
    assert backoff.succeeded() is None and not backoff.down


def test_service_logs_store_down_and_back_once_and_retries_with_backoff(tmp_path, caplog):
    db = tmp_path / "s.db"
    store = open_store(str(db), busy_timeout_s=0.01)
    attempts = []
    real_flush = store.flush

    def counting_flush():
        attempts.append(time.monotonic())
        return real_flush()

    store.flush = counting_flush
    service = Service(engine=None, store=store, sources=[], refit_workers=0, store_retry_base_s=0.02,
                      store_retry_cap_s=0.08)
    lock = sqlite3.connect(db, isolation_level=None)
    lock.execute("BEGIN EXCLUSIVE")
    from datetime import datetime, timezone

    store.stage_reject_count("scada", "bad_time", 3, datetime.now(timezone.utc), datetime.now(timezone.utc))
    calls = 0
    with caplog.at_level(logging.INFO, logger="leadline.service"):
        deadline = time.monotonic() + 0.6
        while time.monotonic() < deadline:
            service._commit()
            calls += 1
            time.sleep(0.001)
        down_attempts = len(attempts)
        lock.execute("ROLLBACK")
        lock.close()
        deadline = time.monotonic() + 5
        while service.store_backoff.down and time.monotonic() < deadline:
            service._commit()
            time.sleep(0.005)
    messages = [r.getMessage() for r in caplog.records]
    assert sum(m.startswith("store down") for m in messages) == 1
    assert sum(m.startswith("store back") for m in messages) == 1
    # backoff: waits of 0.02, 0.04, then 0.08 s within 0.6 s: about 9 tries, not one per call
    assert 3 <= down_attempts <= 15 < calls
    assert [(c.reason, c.count) for c in store.reject_counts()] == [("bad_time", 3)]
    store.close()


# ------------------------------------------------------------------------------ config defaults and warnings
def test_store_defaults_to_the_state_directory(tmp_path, monkeypatch):
    monkeypatch.setenv("STATE_DIRECTORY", f"{tmp_path / 'state'}:{tmp_path / 'other'}")
    config = config_from_text("", tmp_path / "etc" / "leadline.toml")
    assert config.store.sqlite_path == tmp_path / "state" / "leadline.db"
    monkeypatch.delenv("STATE_DIRECTORY")
    assert default_store_path(tmp_path / "etc") == tmp_path / "etc" / "leadline.db"


def test_credentials_without_tls_are_named(tmp_path, monkeypatch):
    monkeypatch.setenv("LEADLINE_TEST_PW", "x")
    text = """
[[sources.mqtt]]
name = "plain"
client_id = "c1"
username = "leadline"
password_env = "LEADLINE_TEST_PW"
topics = [{ pattern = "a/+b" }]

[[sources.mqtt]]
name = "anonymous"
client_id = "c2"
topics = [{ pattern = "a/+b" }]
"""
    (warning,) = plaintext_credential_warnings(config_from_text(text, tmp_path / "c.toml"))
    assert "'plain'" in warning and "without TLS" in warning


# ------------------------------------------------------------------------------ leadline run as a process
def _run(args: list[str], env: dict | None = None, timeout: float = 60) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "leadline.adapters.cli", "run", *args], capture_output=True,
                          text=True, timeout=timeout, env={**os.environ, **(env or {})})


def test_exit_status_78_for_a_bad_config_and_64_for_bad_usage(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[store]\nflush_intervall_s = 1\n")
    result = _run(["--config", str(bad)])
    assert result.returncode == EX_CONFIG, result.stderr
    assert "flush_intervall_s" in result.stderr and "Traceback" not in result.stderr
    assert _run(["--config", str(bad), "--log-level", "loud"]).returncode == EX_USAGE
    assert _run([]).returncode == EX_USAGE


def test_exit_status_75_when_the_store_or_the_broker_is_down_at_start(tmp_path):
    config = tmp_path / "pg.toml"
    config.write_text(f'[store]\nurl = "postgresql+psycopg://leadline@127.0.0.1:{_free_port()}/leadline"\n')
    result = _run(["--config", str(config)])
    assert result.returncode == EX_TEMPFAIL, result.stderr
    assert "Traceback" not in result.stderr
    config = tmp_path / "mqtt.toml"
    config.write_text(f"""
[store]
url = "s.db"

[[sources.mqtt]]
name = "plant"
port = {_free_port()}
client_id = "leadline-down"
topics = [{{ pattern = "plant/+meter" }}]
""")
    result = _run(["--config", str(config), "--startup-timeout", "1", "--log-format", "json"])
    assert result.returncode == EX_TEMPFAIL, result.stderr
    assert '"exit_status=75"' in result.stderr or "exit_status=75" in result.stderr


def test_sigterm_exits_0_after_ready_and_stopping_and_the_store_is_private(tmp_path):
    (tmp_path / "in").mkdir()
    (tmp_path / "in" / "flow.csv").write_text("timestamp,feed,value\n2026-05-01T00:00:00Z,millbrook/flow,4.2\n")
    config = tmp_path / "leadline.toml"
    config.write_text('[[sources.csv]]\nname = "scada"\npath = "in/*.csv"\nfrom_start = true\n\n[refit]\nworkers = 1\n')
    state = tmp_path / "state"
    state.mkdir()
    name = f"leadline-run-{os.getpid()}"
    with _datagram_socket("\0" + name) as sock:
        process = subprocess.Popen(
            [sys.executable, "-m", "leadline.adapters.cli", "run", "--config", str(config)],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
            env={**os.environ, "NOTIFY_SOCKET": "@" + name, "STATE_DIRECTORY": str(state), "WATCHDOG_USEC": "",
                 "JOURNAL_STREAM": ""})
        try:
            first = sock.recv(4096).decode()
            assert first.startswith("READY=1\nSTATUS=")
            process.send_signal(signal.SIGTERM)
            messages = []
            while not any(m.startswith("STOPPING=1") for m in messages):
                messages.append(sock.recv(4096).decode())
            _, err = process.communicate(timeout=60)
        finally:
            if process.poll() is None:
                process.kill()
    assert process.returncode == 0, err
    db = state / "leadline.db"
    assert stat.S_IMODE(db.stat().st_mode) == 0o600
    for extra in state.iterdir():
        assert stat.S_IMODE(extra.stat().st_mode) & 0o077 == 0, extra
