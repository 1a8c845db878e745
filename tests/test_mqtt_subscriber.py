"""The MQTT subscriber against a real, private Mosquitto broker (never port 1883)."""

from __future__ import annotations

import json
import logging
import math
import time
from collections import Counter, defaultdict
from datetime import datetime, timezone

import pytest
from mqtt_broker import MosquittoBroker, QosOnePublisher, make_password_file, mosquitto_binary

from leadline.adapters.ports import Source
from leadline.adapters.sources.mqtt_connection import MqttSettings
from leadline.adapters.sources.mqtt_subscriber import MqttSubscriber, Subscription
from leadline.adapters.sources.payloads import JsonPayload, NumberPayload
from leadline.adapters.sources.senml import SenmlPayload
from leadline.adapters.sources.topics import TopicPattern
from leadline.detector.errors import ConfigError, SourceError

pytestmark = pytest.mark.broker

T0_S = 1_714_521_600  # 2024-05-01T00:00:00Z
UTC = timezone.utc


@pytest.fixture
def broker(tmp_path):
    if mosquitto_binary() is None:
        pytest.skip("no mosquitto binary on this machine (apt-get install mosquitto)")
    with MosquittoBroker(tmp_path / "broker") as running:
        yield running


def topic_of(k: int) -> str:
    return f"plant/site{k % 10}/flow/m{k:03d}"


def feed_of(k: int) -> str:
    return f"site{k % 10}/m{k:03d}"


def json_subscription() -> Subscription:
    return Subscription(TopicPattern("plant/+site/flow/+meter"), JsonPayload(value_path="v", time_path="t"))


def make_subscriber(port: int, client_id: str = "leadline-test-sub", protocol: str = "5", **kwargs) -> MqttSubscriber:
    subscriptions = kwargs.pop("subscriptions", None) or [json_subscription()]
    settings = MqttSettings(client_id=client_id, port=port, protocol=protocol, **kwargs.pop("settings", {}))
    sub = MqttSubscriber("meters-mqtt", settings, subscriptions, **kwargs)
    sub.start()
    return sub


def consume(sub: MqttSubscriber, count: int, timeout_s: float, ack: bool = True) -> list:
    got: list = []
    deadline = time.monotonic() + timeout_s
    while len(got) < count and time.monotonic() < deadline:
        readings = sub.poll(500, 0.1)
        got.extend(readings)
        if ack:
            sub.ack(readings)
    return got


def publish_series(publisher: QosOnePublisher, n_per_feed: int, n_feeds: int, start: int = 0) -> None:
    for i in range(start, start + n_per_feed):
        for k in range(n_feeds):
            publisher.publish(topic_of(k), json.dumps({"v": i, "t": T0_S + i}))


def assert_exactly_once_in_order(readings, n_per_feed: int, n_feeds: int) -> None:
    by_feed = defaultdict(list)
    for r in readings:
        by_feed[r.feed_id].append((r.timestamp, r.value))
    assert sorted(by_feed) == sorted(feed_of(k) for k in range(n_feeds))
    expected = [(datetime.fromtimestamp(T0_S + i, UTC), float(i)) for i in range(n_per_feed)]
    for feed, series in by_feed.items():
        assert series == expected, f"{feed}: {len(series)} readings, first difference near " + str(
            next((a, b) for a, b in zip(series + [None] * len(expected), expected) if a != b)
        )


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_ten_thousand_readings_over_100_topics_exactly_once_in_order(broker, protocol):
    sub = make_subscriber(broker.port, protocol=protocol)
    assert isinstance(sub, Source)
    sub.wait_connected(10)
    publisher = QosOnePublisher(broker.port)
    try:
        publish_series(publisher, 100, 100)
        got = consume(sub, 10_000, 60)
        assert publisher.wait_all(10)
        got += consume(sub, 1, 0.5)  # nothing more may come
        assert len(got) == 10_000
        assert_exactly_once_in_order(got, 100, 100)
        assert sub.counts()["duplicates"] == 0
        assert sub.pending_messages() == 0
    finally:
        publisher.close()
        sub.close()


def test_unacknowledged_messages_come_again_and_acknowledged_ones_do_not(broker):
    sub = make_subscriber(broker.port, client_id="ack-test")
    sub.wait_connected(10)
    publisher = QosOnePublisher(broker.port)
    publish_series(publisher, 3, 10)  # 30 messages
    assert publisher.wait_all(10)
    got = consume(sub, 30, 10, ack=False)
    assert len(got) == 30
    sub.ack([r for r in got if r.value == 0.0])  # "commit" only the first 10
    time.sleep(0.3)  # let the PUBACKs leave
    sub.close()
    again = make_subscriber(broker.port, client_id="ack-test")
    try:
        redelivered = consume(again, 20, 10)
        redelivered += consume(again, 1, 1.0)
        assert sorted((r.feed_id, r.value) for r in redelivered) == sorted(
            (feed_of(k), float(i)) for i in (1, 2) for k in range(10)
        )
    finally:
        publisher.close()
        again.close()


def test_redelivered_duplicates_are_dropped_and_acknowledged_with_the_original(broker):
    sub = make_subscriber(broker.port, client_id="dedupe-test", settings={"reconnect_min_s": 1, "reconnect_max_s": 1})
    sub.wait_connected(10)
    publisher = QosOnePublisher(broker.port)
    publish_series(publisher, 5, 10)
    assert publisher.wait_all(10)
    held = consume(sub, 50, 10, ack=False)  # polled, not yet committed
    assert len(held) == 50
    broker.restart()  # the broker sends the 50 unacknowledged messages again
    sub.wait_connected(15)
    deadline = time.monotonic() + 10
    while sub.counts()["duplicates"] < 50 and time.monotonic() < deadline:
        assert sub.poll(100, 0.1) == []
    assert sub.counts()["duplicates"] == 50
    sub.ack(held)  # the commit: acks originals and their repeats
    time.sleep(0.3)
    sub.close()
    again = make_subscriber(broker.port, client_id="dedupe-test")
    try:
        assert consume(again, 1, 1.5) == []  # nothing left unacknowledged
    finally:
        publisher.close()
        again.close()


def test_full_queue_blocks_the_callback_instead_of_dropping(broker):
    sub = make_subscriber(broker.port, client_id="backpressure", queue_max_messages=5)
    sub.wait_connected(10)
    publisher = QosOnePublisher(broker.port)
    try:
        publish_series(publisher, 20, 10)  # 200 messages
        time.sleep(1.0)
        assert sub.counts()["queued"] <= 5
        assert sub.counts()["messages"] <= 5 + 1  # the network thread waits on the full queue
        got = consume(sub, 200, 30)
        assert_exactly_once_in_order(got, 20, 10)
        assert sub.counts()["rejects_by_reason"] == {}
    finally:
        publisher.close()
        sub.close()


def test_bad_payloads_are_rejected_with_topic_and_reason_and_acknowledged(broker):
    subs = [
        json_subscription(),
        Subscription(TopicPattern("plain/+meter"), NumberPayload(max_bytes=64)),
    ]
    sub = make_subscriber(broker.port, client_id="rejects", subscriptions=subs)
    sub.wait_connected(10)
    publisher = QosOnePublisher(broker.port)
    cases = [
        (topic_of(1), b"{not json", "not_json"),
        (topic_of(2), b'{"t": 1714521600}', "missing_field"),
        (topic_of(3), b'{"v": "high", "t": 1714521600}', "non_numeric"),
        ("plain/m1", b"9" * 65, "oversized"),
        ("plain/m2", b"\xff\xfe", "bad_utf8"),
        ("plain/m3", b"nan", "not_finite"),
        ("plant//flow/m4", b'{"v": 1, "t": 1714521600}', "bad_topic"),
    ]
    try:
        for topic, payload, _ in cases:
            publisher.publish(topic, payload)
        publisher.publish("plain/m9", b"4.5")
        assert publisher.wait_all(10)
        got = consume(sub, 1, 5)
        assert [(r.feed_id, r.value, r.timestamp_from_arrival) for r in got] == [("m9", 4.5, True)]
        assert sub.arrival_time_feeds() == {"m9": 1}
        deadline = time.monotonic() + 5
        while sum(sub.counts()["rejects_by_reason"].values()) < len(cases) and time.monotonic() < deadline:
            time.sleep(0.05)
        assert sub.counts()["rejects_by_reason"] == dict(Counter(reason for _, _, reason in cases))
        samples = {s.reason: s for s in sub.take_rejects()}
        for topic, payload, reason in cases:
            assert samples[reason].where == topic
            assert samples[reason].raw == payload[:512]
        sub.close()
        again = make_subscriber(broker.port, client_id="rejects", subscriptions=subs)
        assert consume(again, 1, 1.0) == []  # rejected messages were acknowledged
        again.close()
    finally:
        publisher.close()


def test_senml_pack_over_mqtt_gives_one_feed_per_name(broker):
    subs = [Subscription(TopicPattern("senml/+device"), SenmlPayload())]
    sub = make_subscriber(broker.port, client_id="senml", subscriptions=subs)
    sub.wait_connected(10)
    publisher = QosOnePublisher(broker.port)
    pack = [
        {"bn": "pump7:", "bt": T0_S, "n": "flow", "u": "m3/h", "v": 12.5},
        {"n": "pressure", "u": "bar", "v": 3.1, "t": 60},
    ]
    try:
        publisher.publish("senml/westbrook-pumps", json.dumps(pack))
        got = consume(sub, 2, 10)
        assert [(r.feed_id, r.value, r.timestamp) for r in got] == [
            ("westbrook-pumps/pump7:flow", 12.5, datetime.fromtimestamp(T0_S, UTC)),
            ("westbrook-pumps/pump7:pressure", 3.1, datetime.fromtimestamp(T0_S + 60, UTC)),
        ]
        # the SenML "u" of each record (RFC 8428 section 4.5.2) is reported per feed, once
        assert sub.take_units() == {"westbrook-pumps/pump7:flow": "m3/h", "westbrook-pumps/pump7:pressure": "bar"}
        assert sub.take_units() == {}
    finally:
        publisher.close()
        sub.close()


def test_broker_down_at_start_is_retried(tmp_path):
    if mosquitto_binary() is None:
        pytest.skip("no mosquitto binary on this machine")
    broker = MosquittoBroker(tmp_path / "late-broker")
    sub = make_subscriber(broker.port, client_id="late")
    try:
        with pytest.raises(SourceError, match="not connected"):
            sub.wait_connected(1.0)
        broker.start()
        sub.wait_connected(15)
        publisher = QosOnePublisher(broker.port)
        publish_series(publisher, 2, 3)
        got = consume(sub, 6, 10)
        assert_exactly_once_in_order(got, 2, 3)
        publisher.close()
    finally:
        sub.close()
        broker.stop()


def test_username_and_password_from_env_never_logged(tmp_path, monkeypatch, caplog):
    if mosquitto_binary() is None:
        pytest.skip("no mosquitto binary on this machine")
    secret = "s3cret-Hollow-Creek-42"
    password_file = make_password_file(tmp_path / "passwd", "leadline", secret)
    caplog.set_level(logging.DEBUG)
    with MosquittoBroker(tmp_path / "auth-broker", password_file=password_file) as broker:
        monkeypatch.setenv("LEADLINE_TEST_MQTT_PASSWORD", secret)
        good = make_subscriber(
            broker.port, client_id="auth-ok",
            settings={"username": "leadline", "password_env": "LEADLINE_TEST_MQTT_PASSWORD"},
        )
        good.wait_connected(10)
        good.close()
        (tmp_path / "wrong").write_text("not-the-password\n")
        bad = make_subscriber(
            broker.port, client_id="auth-bad", settings={"username": "leadline", "password_file": str(tmp_path / "wrong")},
        )
        with pytest.raises(SourceError) as info:
            bad.wait_connected(2)
        bad.close()
    assert "refused" in str(info.value) or "authorized" in str(info.value).lower()
    assert secret not in caplog.text and "not-the-password" not in caplog.text
    assert secret not in str(info.value) and secret not in repr(good.settings)


def test_missing_password_source_is_a_config_error(monkeypatch):
    monkeypatch.delenv("LEADLINE_TEST_MQTT_NOPE", raising=False)
    settings = MqttSettings(client_id="x", username="u", password_env="LEADLINE_TEST_MQTT_NOPE")
    sub = MqttSubscriber("m", settings, [json_subscription()])
    with pytest.raises(ConfigError, match="LEADLINE_TEST_MQTT_NOPE"):
        sub.start()
    with pytest.raises(ConfigError, match="password_env or password_file"):
        MqttSettings.from_mapping({"client_id": "x", "username": "u", "password": "plain"})
    with pytest.raises(ConfigError, match="session_expiry_s"):
        MqttSettings(client_id="x", protocol="5", session_expiry_s=0)


def test_nan_free_values_and_utc_times(broker):
    sub = make_subscriber(broker.port, client_id="types")
    sub.wait_connected(10)
    publisher = QosOnePublisher(broker.port)
    try:
        publisher.publish(topic_of(5), json.dumps({"v": None, "t": "2024-05-01T02:00:00+02:00"}))
        (reading,) = consume(sub, 1, 10)
        assert math.isnan(reading.value) and reading.timestamp == datetime(2024, 5, 1, tzinfo=UTC)
    finally:
        publisher.close()
        sub.close()
