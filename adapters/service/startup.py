"""Checks ``leadline run`` makes once at start: brokers reachable, credentials not sent in clear.

:func:`wait_for_brokers` starts each MQTT source and waits for its first
connection (and subscription); a broker that does not answer within the
timeout is a :class:`~leadline.detector.errors.SourceError`, which
``leadline run`` turns into exit status 75 (EX_TEMPFAIL) so that systemd
starts it again later. Once running, lost connections are retried by the
client itself.

:func:`plaintext_credential_warnings` names each broker connection that
sends a username and password without TLS (MQTT's CONNECT packet carries
them in clear text).
"""

from __future__ import annotations

import time
from typing import Any, Iterable


def wait_for_brokers(sources: Iterable[Any], timeout_s: float) -> None:
    """Start the sources that connect to a broker and wait until each is connected.

    Raises
    ------
    SourceError
        Naming the first source not connected within ``timeout_s`` (shared
        by all of them) and its last connection error.
    """
    waiting = [s for s in sources if callable(getattr(s, "wait_connected", None))]
    for source in waiting:
        source.start()
    deadline = time.monotonic() + timeout_s
    for source in waiting:
        source.wait_connected(max(0.0, deadline - time.monotonic()))


def plaintext_credential_warnings(config: Any) -> list[str]:
    """One message per MQTT connection with a username and password but no TLS."""
    messages = []
    connections = [(f"sources.mqtt {m.name!r}", m.settings()) for m in config.mqtt_sources]
    publisher = config.publisher_settings()
    if publisher is not None:
        connections.append(("publish", publisher))
    for what, settings in connections:
        if settings.username and (settings.password_env or settings.password_file) and not settings.tls:
            messages.append(f"{what}: username and password go to {settings.host}:{settings.port} without TLS, "
                            "readable by anyone on the path; configure tls.ca_file")
    return messages


__all__ = ["plaintext_credential_warnings", "wait_for_brokers"]
