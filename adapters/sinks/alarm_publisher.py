"""Publish alarm events, their clearings and a per-feed status over MQTT.

Each :class:`~leadline.detector.events.AlarmEvent` is published as JSON to
``event_topic`` (a template with ``{feed}``, ``{rule}`` and ``{severity}``),
QoS 1, not retained: once when the episode starts (``"state": "active"``)
and once when it clears (``"state": "cleared"``, with ``end``). A retained
message on ``status_topic`` (template with ``{feed}``) always says whether
the feed is ``"alarm"`` (some rule active) or ``"normal"``, so a dashboard
that connects later sees the current state at once. Every message carries
the advisory caution (:data:`~leadline.detector.events.CAUTION`).

The retained statuses are published again after every reconnect. Messages
wait in paho's bounded queue while the broker is away; when that queue is
full, :meth:`MqttAlarmPublisher.publish` raises
:class:`~leadline.detector.errors.SourceError` instead of dropping silently.

Payload of an event::

    {"feed_id": "northgate/flow/dm-03", "rule": "spike", "severity": "alarm",
     "state": "active", "start": "2024-05-01T06:15:00+00:00", "end": null,
     "peak_abs_z": 6.1, "value_at_onset": 41.0, "forecast_at_onset": 12.3,
     "lower_at_onset": 8.1, "upper_at_onset": 16.5, "parameters": {...},
     "model_version": 3, "detail": "...", "caution": "Advisory only: ..."}
"""

from __future__ import annotations

import json
import logging
import math
import string
import threading
import time
from datetime import datetime, timezone
from typing import Any

import paho.mqtt.client as mqtt

from leadline.adapters.sources.mqtt_connection import MqttSettings, build_client, connect_async
from leadline.detector.errors import ConfigError, SourceError
from leadline.detector.events import CAUTION, AlarmEvent

logger = logging.getLogger("leadline.sources.alarms")

_EVENT_FIELDS = ("feed", "rule", "severity")


def _check_template(template: str, allowed: tuple[str, ...], key: str) -> None:
    if not isinstance(template, str) or not template:
        raise ConfigError(f"{key}: expected a topic template such as 'leadline/alarms/{{feed}}/{{rule}}'")
    if "+" in template or "#" in template or "\0" in template:
        raise ConfigError(f"{key}: {template!r} may not contain '+', '#' or NUL (it names a topic, not a filter)")
    try:
        names = [f for _, f, _, _ in string.Formatter().parse(template) if f is not None]
    except ValueError as exc:
        raise ConfigError(f"{key}: {template!r}: {exc}") from exc
    if "feed" not in names:
        raise ConfigError(f"{key}: {template!r} must contain {{feed}}")
    for name in names:
        if name not in allowed:
            raise ConfigError(f"{key}: {template!r} uses {{{name}}}; expected only {list(allowed)}")


def _json_number(value: float) -> float | None:
    return value if isinstance(value, (int, float)) and math.isfinite(value) else None


def _iso(moment: datetime | None) -> str | None:
    return None if moment is None else moment.astimezone(timezone.utc).isoformat()


def event_payload(event: AlarmEvent, metadata: dict[str, Any] | None = None) -> dict[str, Any]:
    """The JSON object published for ``event`` (NaN becomes null).

    ``metadata``: the feed's configured ``description``, ``unit``, ``site``,
    ``tag`` and ``timezone``, added as a ``feed`` member when any is set.
    """
    payload = {
        "feed_id": event.feed_id,
        "rule": event.rule,
        "severity": event.severity,
        "state": "active" if event.end is None else "cleared",
        "start": _iso(event.start),
        "end": _iso(event.end),
        "peak_abs_z": _json_number(event.peak_abs_z),
        "value_at_onset": _json_number(event.value_at_onset),
        "forecast_at_onset": _json_number(event.forecast_at_onset),
        "lower_at_onset": _json_number(event.lower_at_onset),
        "upper_at_onset": _json_number(event.upper_at_onset),
        "parameters": event.parameters,
        "model_version": event.model_version,
        "detail": event.detail,
        "caution": event.caution,
    }
    described = {k: v for k, v in (metadata or {}).items() if v is not None}
    if described:
        caution = payload.pop("caution")
        payload["feed"] = described
        payload["caution"] = caution
    return payload


class MqttAlarmPublisher:
    """Publishes events (QoS 1, not retained) and retained per-feed statuses.

    The MQTT :class:`~leadline.adapters.ports.AlarmPublisher`.

    Parameters
    ----------
    settings : MqttSettings
        Use a client id of its own (not the subscriber's).
    event_topic : str
        Template with ``{feed}`` and optionally ``{rule}``, ``{severity}``.
    status_topic : str
        Template with ``{feed}``.
    max_queued_messages : int
        paho's outgoing queue bound while the broker is away.
    """

    def __init__(
        self,
        settings: MqttSettings,
        event_topic: str = "leadline/alarms/{feed}/{rule}",
        status_topic: str = "leadline/status/{feed}",
        max_queued_messages: int = 10_000,
        metadata: Any = None,
    ):
        _check_template(event_topic, _EVENT_FIELDS, "event_topic")
        _check_template(status_topic, ("feed",), "status_topic")
        self.settings = settings
        self.event_topic = event_topic
        self.status_topic = status_topic
        self.max_queued_messages = max_queued_messages
        #: ``metadata(feed_id) -> dict`` (description, unit, site, tag, timezone), or None.
        self.metadata = metadata
        self._client: mqtt.Client | None = None
        self._lock = threading.Lock()
        self._active: dict[str, dict[tuple[str, datetime], AlarmEvent]] = {}
        self._infos: list[mqtt.MQTTMessageInfo] = []
        self._connected = threading.Event()

    def start(self) -> None:
        if self._client is not None:
            return
        client = build_client(self.settings)
        client.max_queued_messages_set(self.max_queued_messages)
        client.max_inflight_messages_set(100)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        self._client = client
        connect_async(client, self.settings)
        client.loop_start()

    def wait_connected(self, timeout_s: float) -> None:
        if not self._connected.wait(timeout_s):
            reason = getattr(self._client, "last_connect_error", None)
            raise SourceError(
                f"alarm publisher: not connected to {self.settings.address} after {timeout_s} s"
                + (f"; last error: {reason}" if reason else "")
            )

    def publish(self, event: AlarmEvent) -> None:
        """Publish ``event`` (start or clearing) and the feed's new status."""
        topic = self._topic(self.event_topic, feed=event.feed_id, rule=event.rule, severity=event.severity)
        with self._lock:
            active = self._active.setdefault(event.feed_id, {})
            key = (event.rule, event.start)
            if event.end is None:
                active[key] = event
            else:
                active.pop(key, None)
            status = self._status_payload(event.feed_id)
        meta = self.metadata(event.feed_id) if self.metadata is not None else None
        self._send(topic, event_payload(event, meta), retain=False)
        self._send(self._topic(self.status_topic, feed=event.feed_id), status, retain=True)

    def flush(self, timeout_s: float) -> bool:
        """Wait until every message so far is acknowledged by the broker."""
        with self._lock:
            infos, self._infos = self._infos, []
        deadline = time.monotonic() + timeout_s
        for index, info in enumerate(infos):
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                with self._lock:
                    self._infos = infos[index:] + self._infos
                return False
            try:
                info.wait_for_publish(remaining)
            except (RuntimeError, ValueError):
                pass
            if not info.is_published():
                with self._lock:
                    self._infos = infos[index:] + self._infos
                return False
        return True

    def close(self) -> None:
        """Disconnect and stop the network thread; safe to call twice."""
        client = self._client
        if client is not None:
            client.disconnect()
            client.loop_stop()
            self._client = None

    def status_of(self, feed_id: str) -> str:
        with self._lock:
            return "alarm" if self._active.get(feed_id) else "normal"

    # -- internals ----------------------------------------------------------------
    def _topic(self, template: str, **values: str) -> str:
        feed = values["feed"]
        if not feed or "+" in feed or "#" in feed or "\0" in feed:
            raise SourceError(f"alarm publisher: feed id {feed!r} cannot be part of a topic (contains '+', '#' or NUL)")
        return template.format(**values)

    def _status_payload(self, feed_id: str) -> dict[str, Any]:
        active = self._active.get(feed_id, {})
        return {
            "feed_id": feed_id,
            "state": "alarm" if active else "normal",
            "active_rules": sorted({rule for rule, _ in active}),
            "updated_at": datetime.now(timezone.utc).isoformat(),
            "caution": CAUTION,
        }

    def _send(self, topic: str, payload: dict[str, Any], retain: bool) -> None:
        client = self._client
        if client is None:
            raise SourceError("alarm publisher: start() was not called")
        info = client.publish(topic, json.dumps(payload, allow_nan=False), qos=1, retain=retain)
        if info.rc == mqtt.MQTT_ERR_QUEUE_SIZE:
            raise SourceError(
                f"alarm publisher: outgoing queue full ({self.max_queued_messages} messages) while "
                f"{self.settings.address} is unreachable; {topic!r} not published"
            )
        with self._lock:
            self._infos.append(info)
            if len(self._infos) > 4 * self.max_queued_messages:
                self._infos = [i for i in self._infos if not i.is_published()]

    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason_code: Any, properties: Any) -> None:
        if reason_code.is_failure:
            logger.warning("alarm publisher: %s refused the connection: %s", self.settings.address, reason_code)
            return
        self._connected.set()
        logger.info("alarm publisher: connected to %s", self.settings.address)
        with self._lock:
            statuses = [(feed, self._status_payload(feed)) for feed in self._active]
        for feed, status in statuses:
            client.publish(self._topic(self.status_topic, feed=feed), json.dumps(status), qos=1, retain=True)

    def _on_disconnect(self, client: mqtt.Client, userdata: Any, flags: Any, reason_code: Any, properties: Any) -> None:
        self._connected.clear()
        logger.warning("alarm publisher: disconnected from %s (%s)", self.settings.address, reason_code)

