"""Inputs: followed CSV files, MQTT subscriptions, payload formats, a history CSV.

:class:`CsvFollower` and :class:`MqttSubscriber` are
:class:`~leadline.adapters.ports.Source` objects for the service loop;
:func:`read_series_csv` reads a whole history for ``leadline score``.
Modules: :mod:`.csv_follow`, :mod:`.csv_rows` (rows to readings, layouts),
:mod:`.mqtt_subscriber`, :mod:`.mqtt_connection` (settings, TLS, client),
:mod:`.topics` (topic patterns), :mod:`.payloads` and :mod:`.senml` (payload
parsers), :mod:`.timeparse` (timestamps to UTC), :mod:`.rejects` (reject
counts and samples), :mod:`.series_csv`.
"""

from .csv_follow import CsvFollower
from .csv_rows import CsvLayout
from .mqtt_connection import MqttSettings
from .mqtt_subscriber import MqttSubscriber, Subscription
from .payloads import JsonPayload, NumberPayload
from .senml import SenmlPayload
from .series_csv import read_series_csv
from .topics import TopicPattern

__all__ = [
    "CsvFollower",
    "CsvLayout",
    "JsonPayload",
    "MqttSettings",
    "MqttSubscriber",
    "NumberPayload",
    "SenmlPayload",
    "Subscription",
    "TopicPattern",
    "read_series_csv",
]
