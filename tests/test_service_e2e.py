"""``leadline run`` end to end: a real broker, followed CSV files, SIGTERM, restart and kill -9.

A scripted stretch of an invented feed pair is published over MQTT (JSON
payloads with their own times) and written to a followed CSV file, each with
one planted wild reading. The service runs as a subprocess, as an operator
would start it.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from leadline.adapters.store import open_store
from leadline.detector.simulate import simulate_arima
from mqtt_broker import MosquittoBroker, QosOnePublisher, mosquitto_binary

START = datetime(2026, 9, 7, tzinfo=timezone.utc)
STEP = timedelta(minutes=15)
N = 420
SPIKE_MQTT, SPIKE_CSV = 360, 380
CONFIG = """\
[store]
url = "leadline.db"
flush_interval_s = 0.5

[[sources.csv]]
name = "ridgeway-export"
path = "export/*.csv"
from_start = true

[[sources.mqtt]]
name = "ridgeway-broker"
host = "127.0.0.1"
port = {port}
client_id = "leadline-e2e"
protocol = "5"
topics = [{{ pattern = "ridgeway/+site/pressure", feed = "ridgeway/{{site}}/pressure", payload = "json", value_path = "v", time_path = "t" }}]

[feeds.defaults]
interval = "15min"
train_points = 300
model = {{ order = [1, 0, 0] }}
threshold_mode = "sigma"

[refit]
every = "30d"
workers = 1
"""


def series(seed: int, spike_at: int):
    values = simulate_arima(N, ar=[0.6], mean=4.0, sigma=0.05, seed=seed)
    values[spike_at] += 1.0  # 20 sigma
    return values


def stamp(i: int) -> str:
    return (START + i * STEP).isoformat().replace("+00:00", "Z")


@pytest.fixture()
def site(tmp_path):
    if mosquitto_binary() is None:
        pytest.skip("no mosquitto binary on this machine (apt-get install mosquitto)")
    broker = MosquittoBroker(tmp_path / "broker").start()
    (tmp_path / "export").mkdir()
    (tmp_path / "leadline.toml").write_text(CONFIG.format(port=broker.port))
    yield tmp_path, broker
    broker.stop()


def start_service(folder: Path) -> subprocess.Popen:
    with (folder / "service.log").open("a") as log:
        return subprocess.Popen([sys.executable, "-m", "leadline.adapters.cli", "run", "--config",
                                 str(folder / "leadline.toml"), "--replay"], stdout=log, stderr=subprocess.STDOUT,
                                env={**os.environ, "PYTHONUNBUFFERED": "1"})


def wait_subscribed(folder: Path, times: int = 1) -> None:
    """The session exists only once the service has subscribed; before that the broker drops messages."""
    wait_for(lambda: (folder / "service.log").read_text().count("subscribing to") >= times, 30,
             "the service's MQTT subscription")
    time.sleep(0.5)


def publish(broker, values, rows: range) -> None:
    publisher = QosOnePublisher(broker.port, client_id=f"e2e-pub-{rows.start}")
    for i in rows:
        publisher.publish("ridgeway/hilltop/pressure", json.dumps({"t": stamp(i), "v": float(values[i])}))
    assert publisher.wait_all(30.0)
    publisher.close()


def append_csv(folder: Path, values, rows: range) -> None:
    path = folder / "export" / "ridgeway.csv"
    new = not path.exists()
    with path.open("a") as handle:
        if new:
            handle.write("timestamp,feed,value\n")
        for i in rows:
            handle.write(f"{stamp(i)},ridgeway/valley/pressure,{float(values[i])!r}\n")


def wait_for(condition, timeout_s: float, what: str):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        result = condition()
        if result:
            return result
        time.sleep(0.25)
    raise AssertionError(f"timed out waiting for {what}")


def stored_events(folder: Path):
    store = open_store(f"sqlite:///{folder / 'leadline.db'}")
    try:
        return store.events(since=START, until=START + N * STEP)
    finally:
        store.close()


def spike_keys(folder: Path):
    return sorted((e.event.feed_id, e.event.start) for e in stored_events(folder)
                  if e.event.rule == "spike" and e.event.end is not None)


EXPECTED = [("ridgeway/hilltop/pressure", START + SPIKE_MQTT * STEP),
            ("ridgeway/valley/pressure", START + SPIKE_CSV * STEP)]


def stop(process: subprocess.Popen) -> int:
    process.send_signal(signal.SIGTERM)
    return process.wait(timeout=60)


def test_run_stores_each_event_once_checkpoints_and_restarts_without_learning(site):
    folder, broker = site
    mqtt_values, csv_values = series(1, SPIKE_MQTT), series(2, SPIKE_CSV)
    process = start_service(folder)
    try:
        wait_subscribed(folder)
        publish(broker, mqtt_values, range(0, 400))
        append_csv(folder, csv_values, range(0, 400))
        wait_for(lambda: spike_keys(folder) == EXPECTED, 90, "both planted spikes, cleared, in the store")
    finally:
        assert stop(process) == 0  # SIGTERM: drain, flush, exit 0
    log = (folder / "service.log").read_text()
    assert "stopped" in log and "Traceback" not in log
    store = open_store(f"sqlite:///{folder / 'leadline.db'}")
    try:
        checkpoints = store.load_checkpoints()
        assert set(checkpoints) == {"ridgeway/hilltop/pressure", "ridgeway/valley/pressure"}
        assert all(version == 1 for _, version in checkpoints.values())
    finally:
        store.close()
    keys = [(e.event.feed_id, e.event.rule, e.event.start) for e in stored_events(folder)]
    assert len(keys) == len(set(keys))

    # A restart continues from the checkpoints: no learning phase, no new fit.
    before = log.count("refit requested")
    process = start_service(folder)
    try:
        publish(broker, mqtt_values, range(400, N))
        append_csv(folder, csv_values, range(400, N))
        wait_for(lambda: "checkpoint restored" in (folder / "service.log").read_text(), 30, "the restore")
        time.sleep(3.0)
    finally:
        assert stop(process) == 0
    log = (folder / "service.log").read_text()
    assert log.count("refit requested") == before
    assert "new=learning" not in log[len(log) // 2:]
    assert spike_keys(folder) == EXPECTED

    listed = subprocess.run([sys.executable, "-m", "leadline.adapters.cli", "events", "--each-event", "--config",
                             str(folder / "leadline.toml"), "--since", START.isoformat(), "--format", "json"],
                            capture_output=True, text=True, timeout=60)
    assert listed.returncode == 0, listed.stderr
    document = json.loads(listed.stdout)
    spikes = [(e["feed_id"], datetime.fromisoformat(e["start"])) for e in document["events"] if e["rule"] == "spike"]
    assert sorted(spikes) == EXPECTED
    assert "operator judgment" in document["caution"]


def test_kill_9_mid_stream_loses_and_duplicates_nothing(site):
    folder, broker = site
    mqtt_values, csv_values = series(3, SPIKE_MQTT), series(4, SPIKE_CSV)
    process = start_service(folder)
    wait_subscribed(folder)
    publish(broker, mqtt_values, range(0, 370))
    append_csv(folder, csv_values, range(0, 370))
    wait_for(lambda: any(k[0] == "ridgeway/hilltop/pressure" for k in spike_keys(folder)), 90,
             "the first spike committed")
    # Both feeds past learning (a feed still learning has no checkpoint and would learn again).
    wait_for(lambda: (folder / "service.log").read_text().count("model installed") == 2, 60, "both models")
    time.sleep(1.5)  # one commit interval, so the new models' checkpoints are durable
    committed = set(spike_keys(folder))
    process.send_signal(signal.SIGKILL)  # no drain, no flush
    process.wait(timeout=30)
    # The publisher keeps going while the service is down; the broker queues for its session.
    publish(broker, mqtt_values, range(370, N))
    append_csv(folder, csv_values, range(370, N))
    process = start_service(folder)
    try:
        wait_for(lambda: spike_keys(folder) == EXPECTED, 90, "both spikes after the restart")
    finally:
        assert stop(process) == 0
    assert committed <= set(spike_keys(folder))  # nothing committed was lost
    keys = [(e.event.feed_id, e.event.rule, e.event.start) for e in stored_events(folder)]
    assert len(keys) == len(set(keys))  # and nothing duplicated
    store = open_store(f"sqlite:///{folder / 'leadline.db'}")
    try:
        offsets = store.load_offsets("ridgeway-export")
    finally:
        store.close()
    size = (folder / "export" / "ridgeway.csv").stat().st_size
    assert [o.offset_bytes for o in offsets.values()] == [size]  # the whole file, once
