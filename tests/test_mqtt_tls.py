"""TLS: a broker with a certificate made for the test (openssl CLI, see mqtt_broker.py)."""

from __future__ import annotations

import json
import time

import pytest
from mqtt_broker import MosquittoBroker, QosOnePublisher, make_tls_files, mosquitto_binary

from leadline.adapters.sources.mqtt_connection import MqttSettings
from leadline.adapters.sources.mqtt_subscriber import MqttSubscriber, Subscription
from leadline.adapters.sources.payloads import JsonPayload
from leadline.adapters.sources.topics import TopicPattern
from leadline.detector.errors import ConfigError, SourceError

pytestmark = pytest.mark.broker


@pytest.fixture(scope="module")
def tls_files(tmp_path_factory):
    if mosquitto_binary() is None:
        pytest.skip("no mosquitto binary on this machine (apt-get install mosquitto)")
    return make_tls_files(tmp_path_factory.mktemp("tls"))


def subscriber(port: int, client_id: str, **settings) -> MqttSubscriber:
    sub = MqttSubscriber(
        "tls-test",
        MqttSettings(client_id=client_id, port=port, **settings),
        [Subscription(TopicPattern("plant/+site/flow/+meter"), JsonPayload("v", "t"))],
    )
    sub.start()
    return sub


def test_client_connects_with_the_ca_file_and_receives(tmp_path, tls_files):
    with MosquittoBroker(tmp_path / "broker", tls=tls_files) as broker:
        sub = subscriber(broker.port, "tls-ok", ca_file=str(tls_files.ca_file))
        try:
            sub.wait_connected(10)
            publisher = QosOnePublisher(broker.port, tls_ca=tls_files.ca_file)
            publisher.publish("plant/eastfield/flow/dm-1", json.dumps({"v": 2.5, "t": 1714521600}))
            deadline = time.monotonic() + 10
            got = []
            while not got and time.monotonic() < deadline:
                got = sub.poll(10, 0.1)
            sub.ack(got)
            assert [(r.feed_id, r.value) for r in got] == [("eastfield/dm-1", 2.5)]
            publisher.close()
        finally:
            sub.close()


def test_client_refuses_a_server_it_cannot_verify(tmp_path, tls_files):
    with MosquittoBroker(tmp_path / "broker", tls=tls_files) as broker:
        # The client trusts only an unrelated CA, so the server's chain fails.
        sub = subscriber(broker.port, "tls-wrong-ca", ca_file=str(tls_files.other_ca_file))
        try:
            with pytest.raises(SourceError, match="CERTIFICATE_VERIFY_FAILED|certificate verify failed"):
                sub.wait_connected(3)
            assert not sub.connected
        finally:
            sub.close()
        # And a plain (non-TLS) client cannot talk to the TLS listener either.
        plain = subscriber(broker.port, "tls-plain")
        try:
            with pytest.raises(SourceError):
                plain.wait_connected(2)
        finally:
            plain.close()


def test_hostname_must_match_the_certificate(tmp_path, tls_files):
    # The server certificate names 127.0.0.1 and localhost only.
    with MosquittoBroker(tmp_path / "broker", tls=tls_files) as broker:
        ok = subscriber(broker.port, "tls-localhost", host="localhost", ca_file=str(tls_files.ca_file))
        try:
            ok.wait_connected(10)
        finally:
            ok.close()


def test_client_certificate_when_the_broker_requires_one(tmp_path, tls_files):
    with MosquittoBroker(tmp_path / "broker", tls=tls_files, require_certificate=True) as broker:
        with_cert = subscriber(
            broker.port, "tls-cert", ca_file=str(tls_files.ca_file),
            cert_file=str(tls_files.client_cert), key_file=str(tls_files.client_key),
        )
        try:
            with_cert.wait_connected(10)
        finally:
            with_cert.close()
        without = subscriber(broker.port, "tls-nocert", ca_file=str(tls_files.ca_file))
        try:
            with pytest.raises(SourceError):
                without.wait_connected(2)
        finally:
            without.close()


def test_unreadable_ca_file_is_a_config_error(tmp_path):
    sub = MqttSubscriber(
        "tls-test",
        MqttSettings(client_id="x", ca_file=str(tmp_path / "missing.pem")),
        [Subscription(TopicPattern("a/+b"), JsonPayload())],
    )
    with pytest.raises(ConfigError, match="TLS files"):
        sub.start()
