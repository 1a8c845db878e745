"""leadline's adapters: everything that touches the world around the numeric core.

Sub-packages, each with its own ``__all__``:

- :mod:`.ports`: the protocols the service is written against
  (:class:`Source`, :class:`EventSink`, :class:`AlarmPublisher`) and the
  records that cross them (:class:`SourceOffset`, :class:`RejectSample`);
- :mod:`.sources`: inputs (followed CSV files, MQTT subscriptions, payload
  formats, a whole history CSV);
- :mod:`.store`: the event store on SQLite or PostgreSQL; its write side for
  the service, its query side for the review commands;
- :mod:`.sinks`: outputs besides the store (the MQTT alarm publisher);
- :mod:`.config`: the TOML config file;
- :mod:`.service`: the service loop and its wiring from a config;
- :mod:`.cli`: the ``leadline`` command (its subcommand modules are internal).

The names below are the public surface. They are imported on first use, so
importing one sub-package (the CLI, the store) does not load all the others.
"""

from __future__ import annotations

import importlib
from typing import Any

#: Public name -> the sub-package that defines it.
_EXPORTS = {
    "AlarmPublisher": "ports",
    "EventSink": "ports",
    "RejectSample": "ports",
    "Source": "ports",
    "SourceOffset": "ports",
    "CsvFollower": "sources",
    "MqttSubscriber": "sources",
    "EventQueries": "store",
    "EventStore": "store",
    "EventWriter": "store",
    "open_store": "store",
    "upgrade_store": "store",
    "MqttAlarmPublisher": "sinks",
    "Config": "config",
    "load_config": "config",
    "Service": "service",
    "build_service": "service",
    "run_service": "service",
    "main": "cli",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    package = _EXPORTS.get(name)
    if package is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{package}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
