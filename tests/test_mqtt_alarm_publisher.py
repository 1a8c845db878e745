"""Alarm publishing: events and clearings (QoS 1, not retained) and a retained status."""

from __future__ import annotations

import json
import queue
import threading
from datetime import datetime, timedelta, timezone

import paho.mqtt.client as mqtt
import pytest
from mqtt_broker import MosquittoBroker, mosquitto_binary
from paho.mqtt.enums import CallbackAPIVersion

from leadline.adapters.sinks.alarm_publisher import MqttAlarmPublisher as AlarmPublisher
from leadline.adapters.sources.mqtt_connection import MqttSettings
from leadline.detector.errors import ConfigError, SourceError
from leadline.detector.events import CAUTION, AlarmEvent

pytestmark = pytest.mark.broker
UTC = timezone.utc
START = datetime(2024, 5, 1, 6, 15, tzinfo=UTC)


@pytest.fixture
def broker(tmp_path):
    if mosquitto_binary() is None:
        pytest.skip("no mosquitto binary on this machine (apt-get install mosquitto)")
    with MosquittoBroker(tmp_path / "broker") as running:
        yield running


class Listener:
    """A plain paho subscriber collecting (topic, payload, qos, retain)."""

    def __init__(self, port: int, topic: str):
        self.messages: queue.Queue = queue.Queue()
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="", protocol=mqtt.MQTTv311)
        subscribed = threading.Event()
        self.client.on_connect = lambda c, u, f, rc, p: c.subscribe(topic, qos=1)
        self.client.on_subscribe = lambda c, u, mid, rcs, p: subscribed.set()
        self.client.on_message = lambda c, u, m: self.messages.put((m.topic, json.loads(m.payload), m.qos, m.retain))
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        assert subscribed.wait(10)

    def take(self, n: int, timeout_s: float = 10.0) -> list:
        return [self.messages.get(timeout=timeout_s) for _ in range(n)]

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def spike(**changes) -> AlarmEvent:
    event = AlarmEvent(
        feed_id="northgate/flow/dm-03", rule="spike", severity="alarm", start=START,
        peak_abs_z=6.2, value_at_onset=41.0, forecast_at_onset=12.0, lower_at_onset=float("nan"),
        parameters={"limit": 4.0}, model_version=3, detail="z = 6.2 above 4.0",
    )
    return event if not changes else event.cleared(**changes)


def test_event_and_clearing_published_qos1_not_retained_with_retained_status(broker):
    events = Listener(broker.port, "leadline/alarms/#")
    publisher = AlarmPublisher(MqttSettings(client_id="leadline-alarms", port=broker.port))
    publisher.start()
    publisher.wait_connected(10)
    try:
        publisher.publish(spike())
        (topic, payload, qos, retain), = events.take(1)
        assert topic == "leadline/alarms/northgate/flow/dm-03/spike"
        assert qos == 1 and retain is False
        assert payload["state"] == "active" and payload["end"] is None
        assert payload["start"] == "2024-05-01T06:15:00+00:00"
        assert payload["lower_at_onset"] is None  # NaN is not JSON
        assert payload["caution"] == CAUTION
        assert publisher.flush(10)
        late = Listener(broker.port, "leadline/status/#")  # joins after the fact
        (topic, status, _, retain), = late.take(1)
        assert topic == "leadline/status/northgate/flow/dm-03" and retain is True
        assert status["state"] == "alarm" and status["active_rules"] == ["spike"]
        late.close()

        publisher.publish(spike(end=START + timedelta(minutes=20)))
        (_, payload, qos, retain), = events.take(1)
        assert payload["state"] == "cleared" and payload["end"] == "2024-05-01T06:35:00+00:00"
        assert qos == 1 and retain is False
        assert publisher.flush(10)
        later = Listener(broker.port, "leadline/status/#")
        (_, status, _, retain), = later.take(1)
        assert status["state"] == "normal" and status["active_rules"] == [] and retain is True
        later.close()
        assert publisher.status_of("northgate/flow/dm-03") == "normal"
    finally:
        events.close()
        publisher.close()


def test_templates_are_validated():
    settings = MqttSettings(client_id="x")
    with pytest.raises(ConfigError, match="must contain"):
        AlarmPublisher(settings, event_topic="alarms/{rule}")
    with pytest.raises(ConfigError, match="may not contain"):
        AlarmPublisher(settings, status_topic="status/+/{feed}")
    with pytest.raises(ConfigError, match="expected only"):
        AlarmPublisher(settings, status_topic="status/{feed}/{rule}")


def test_feed_id_with_wildcards_cannot_be_published(broker):
    publisher = AlarmPublisher(MqttSettings(client_id="leadline-alarms-2", port=broker.port))
    publisher.start()
    try:
        with pytest.raises(SourceError, match="cannot be part of a topic"):
            publisher.publish(AlarmEvent(feed_id="bad+feed", rule="spike", severity="warning", start=START))
    finally:
        publisher.close()
