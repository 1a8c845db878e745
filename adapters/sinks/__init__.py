"""Outputs besides the store: where committed alarm events are sent.

:class:`MqttAlarmPublisher` is the MQTT
:class:`~leadline.adapters.ports.AlarmPublisher`; :func:`event_payload` is
the JSON object it publishes for an event.
"""

from .alarm_publisher import MqttAlarmPublisher, event_payload

__all__ = ["MqttAlarmPublisher", "event_payload"]
