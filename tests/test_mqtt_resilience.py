"""Outages with a real broker: the broker stopped mid-stream, the subscriber killed.

Both use Mosquitto with ``persistence true`` and a ``max_queued_messages``
above the number of messages queued during the outage (the default is 1000
per client, mosquitto.conf(5), ``max_queued_messages``; the broker drops the
messages beyond it with only a log line).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import threading
import time
from collections import Counter, defaultdict
from datetime import datetime, timezone
from pathlib import Path

import pytest
from mqtt_broker import MosquittoBroker, QosOnePublisher, mosquitto_binary

from leadline.adapters.sources.mqtt_connection import MqttSettings
from leadline.adapters.sources.mqtt_subscriber import MqttSubscriber, Subscription
from leadline.adapters.sources.payloads import JsonPayload
from leadline.adapters.sources.topics import TopicPattern

pytestmark = pytest.mark.broker

T0_S = 1_714_521_600
UTC = timezone.utc


@pytest.fixture
def broker(tmp_path):
    if mosquitto_binary() is None:
        pytest.skip("no mosquitto binary on this machine (apt-get install mosquitto)")
    with MosquittoBroker(tmp_path / "broker", max_queued_messages=100_000) as running:
        yield running


def topic(k: int) -> str:
    return f"plant/site{k % 10}/flow/m{k:03d}"


def paced_publish(publisher: QosOnePublisher, rounds: int, feeds: int, pause_s: float, start: int = 0) -> None:
    for i in range(start, start + rounds):
        for k in range(feeds):
            publisher.publish(topic(k), json.dumps({"v": i, "t": T0_S + i}))
        time.sleep(pause_s)


def check_series(pairs, rounds: int, feeds: int) -> None:
    """Every feed got every round once, in publish order."""
    by_feed = defaultdict(list)
    for feed, t_s in pairs:
        by_feed[feed].append(t_s)
    assert len(by_feed) == feeds
    for feed, times in by_feed.items():
        assert times == [T0_S + i for i in range(rounds)], f"{feed}: {Counter(times).most_common(2)}, n={len(times)}"


class Consumer(threading.Thread):
    """The service loop in miniature: poll, 'commit' (keep), then ack."""

    def __init__(self, sub: MqttSubscriber):
        super().__init__(daemon=True)
        self.sub = sub
        self.readings: list = []
        self.halt = threading.Event()

    def run(self) -> None:
        while not self.halt.is_set():
            batch = self.sub.poll(500, 0.1)
            self.readings.extend(batch)
            self.sub.ack(batch)


def test_broker_stopped_five_seconds_mid_stream_loses_nothing(broker):
    rounds, feeds = 40, 100  # 4000 messages
    settings = MqttSettings(client_id="outage-sub", port=broker.port, protocol="5", reconnect_min_s=1, reconnect_max_s=1)
    sub = MqttSubscriber(
        "outage", settings, [Subscription(TopicPattern("plant/+site/flow/+meter"), JsonPayload("v", "t"))]
    )
    sub.start()
    sub.wait_connected(10)
    consumer = Consumer(sub)
    consumer.start()
    publisher = QosOnePublisher(broker.port, client_id="outage-pub")
    sender = threading.Thread(target=paced_publish, args=(publisher, rounds, feeds, 0.05), daemon=True)
    sender.start()
    try:
        time.sleep(0.8)
        broker.stop()  # mid-stream: the publisher keeps publishing into paho's queue
        down_at = time.monotonic()
        time.sleep(5.0)
        broker.start()
        up_at = time.monotonic()
        assert up_at - down_at >= 5.0
        during = [p for p in publisher.published if down_at <= p[2] < up_at]
        assert during, "the outage did not fall in mid-stream"
        sender.join(30)
        assert publisher.wait_all(30), "the publisher could not deliver everything after the restart"
        deadline = time.monotonic() + 30
        while len(consumer.readings) < rounds * feeds and time.monotonic() < deadline:
            time.sleep(0.1)
        time.sleep(1.0)  # late duplicates would show up here
    finally:
        consumer.halt.set()
        consumer.join(5)
        publisher.close()
        sub.close()
    pairs = [(r.feed_id, r.timestamp.timestamp()) for r in consumer.readings]
    assert len(pairs) == rounds * feeds, f"{len(pairs)} readings, {sub.counts()}"
    check_series(pairs, rounds, feeds)
    # Every delivery, repeats included, went through the subscriber once at least.
    counts = sub.counts()
    assert counts["messages"] == rounds * feeds + counts["duplicates"] + counts["queued"]


CHILD = textwrap.dedent(
    """
    import os, sys
    from datetime import datetime
    from leadline.adapters.sources.mqtt_connection import MqttSettings
    from leadline.adapters.sources.mqtt_subscriber import MqttSubscriber, Subscription
    from leadline.adapters.sources.payloads import JsonPayload
    from leadline.adapters.sources.topics import TopicPattern

    port, out_path, ready_path, protocol = int(sys.argv[1]), sys.argv[2], sys.argv[3], sys.argv[4]
    # The committed state: the newest reading time per feed (a store would give it).
    resume = {}
    if os.path.exists(out_path):
        for line in open(out_path):
            feed, ts, _ = line.rstrip("\\n").split(",")
            t = datetime.fromisoformat(ts)
            if feed not in resume or t > resume[feed]:
                resume[feed] = t
    settings = MqttSettings(client_id="killed-sub", port=port, protocol=protocol, reconnect_min_s=1, reconnect_max_s=1)
    sub = MqttSubscriber("kill", settings,
                         [Subscription(TopicPattern("plant/+site/flow/+meter"), JsonPayload("v", "t"))],
                         resume_after=resume)
    sub.start()
    sub.wait_connected(15)
    open(ready_path, "w").close()
    with open(out_path, "a") as out:
        while True:
            batch = sub.poll(200, 0.2)
            if batch:
                out.write("".join(f"{r.feed_id},{r.timestamp.isoformat()},{r.value}\\n" for r in batch))
                out.flush()
                os.fsync(out.fileno())   # the commit ...
                sub.ack(batch)           # ... then the acknowledgement
    """
)


def run_kill_and_restart(broker: MosquittoBroker, tmp_path: Path, protocol: str) -> None:
    script = tmp_path / "child.py"
    script.write_text(CHILD)
    out_path = tmp_path / "committed.csv"
    rounds, feeds = 60, 30  # 1800 messages over ~3 s

    def start_child(tag: str) -> subprocess.Popen:
        ready = tmp_path / f"ready-{tag}"
        with open(tmp_path / f"child-{tag}.log", "wb") as log:
            child = subprocess.Popen(
                [sys.executable, str(script), str(broker.port), str(out_path), str(ready), protocol],
                stdout=subprocess.DEVNULL, stderr=log,
            )
        deadline = time.monotonic() + 20
        while not ready.exists():
            assert child.poll() is None, (tmp_path / f"child-{tag}.log").read_text()
            assert time.monotonic() < deadline, "child did not connect"
            time.sleep(0.05)
        return child

    def committed_lines() -> list[str]:
        return out_path.read_text().splitlines() if out_path.exists() else []

    first = start_child("first")
    publisher = QosOnePublisher(broker.port, client_id="kill-pub")
    sender = threading.Thread(target=paced_publish, args=(publisher, rounds, feeds, 0.05), daemon=True)
    second = None
    try:
        sender.start()
        deadline = time.monotonic() + 20
        while len(committed_lines()) < 300:
            assert time.monotonic() < deadline
            time.sleep(0.02)
        os.kill(first.pid, signal.SIGKILL)  # no goodbye: unacked messages stay with the broker
        first.wait(10)
        killed_at = time.monotonic()
        lines_at_kill = len(committed_lines())
        time.sleep(1.0)  # the publisher keeps going; the broker queues for the session
        published_while_down = [p for p in publisher.published if killed_at <= p[2] < killed_at + 1.0]
        assert published_while_down, "nothing was published while the subscriber was down"
        second = start_child("second")
        sender.join(30)
        assert publisher.wait_all(30)
        deadline = time.monotonic() + 30
        while len(committed_lines()) < rounds * feeds and time.monotonic() < deadline:
            time.sleep(0.1)
        time.sleep(0.5)
    finally:
        for child in (first, second):
            if child is not None and child.poll() is None:
                child.kill()
                child.wait(10)
        publisher.close()
    lines = committed_lines()
    pairs = []
    for line in lines:
        feed, ts, _ = line.split(",")
        pairs.append((feed, datetime.fromisoformat(ts).timestamp()))
    assert len(lines) > lines_at_kill  # the second run committed more
    after_restart = {(f, t) for f, t in pairs[lines_at_kill:]}
    for topic_name, payload, _ in published_while_down:
        k = int(topic_name.rsplit("m", 1)[1])
        feed = f"site{k % 10}/m{k:03d}"
        assert (feed, float(json.loads(payload)["t"])) in after_restart  # queued, then delivered
    assert len(pairs) == rounds * feeds, Counter(Counter(pairs).values())
    check_series(pairs, rounds, feeds)


def test_subscriber_killed_and_restarted_gets_the_queued_readings(broker, tmp_path):
    run_kill_and_restart(broker, tmp_path, "5")


@pytest.mark.slow
def test_subscriber_killed_and_restarted_gets_the_queued_readings_mqtt311(broker, tmp_path):
    run_kill_and_restart(broker, tmp_path, "3.1.1")
