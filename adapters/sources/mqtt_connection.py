"""Broker connection settings and a configured paho-mqtt 2.x client.

Shared by the subscriber (:mod:`.mqtt_subscriber`) and the alarm publisher
(:mod:`.alarm_publisher`). What it sets up, following the project's field
notes on paho-mqtt:

* ``CallbackAPIVersion.VERSION2``, MQTT 3.1.1 or 5 (``protocol``);
* a fixed client id and a persistent session: ``clean_session=False`` for
  3.1.1; ``clean_start=False`` plus a Session Expiry Interval above 0 for 5
  (without it an MQTT 5 broker drops the session, and its queue, at
  disconnect);
* TLS with a CA file and an optional client certificate, hostname checked;
* a username, and a password read from an environment variable or a file.
  The password is kept only inside the paho client: it is in no repr, no
  log line and no error message;
* reconnect backoff (``reconnect_delay_set``) for ``connect_async``.
"""

from __future__ import annotations

import logging
import os
import ssl
from dataclasses import dataclass, fields
from typing import Any, Mapping

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from leadline.detector.errors import ConfigError

logger = logging.getLogger("leadline.sources.mqtt")

PROTOCOLS = {"3.1.1": mqtt.MQTTv311, "5": mqtt.MQTTv5}

#: Longest MQTT UTF-8 string (client id), in bytes: a two-byte length prefix
#: (OASIS MQTT Version 5.0, section 1.5.4; Version 3.1.1, section 1.5.3).
MAX_STRING_BYTES = 65535

#: Integer settings and their ranges. Keep Alive is a Two Byte Integer (MQTT 5.0
#: section 3.1.2.10), Session Expiry Interval a Four Byte Integer (3.1.2.11.2),
#: Receive Maximum 1..65535 (3.1.2.11.3); the reconnect backoff is leadline's own.
_INTEGER_RANGES = (
    ("keepalive_s", 0, 65535),
    ("session_expiry_s", 0, 2**32 - 1),
    ("receive_maximum", 1, 65535),
    ("reconnect_min_s", 1, 2**31 - 1),
    ("reconnect_max_s", 1, 2**31 - 1),
)


@dataclass(frozen=True)
class MqttSettings:
    """Where and how to connect.

    Parameters
    ----------
    client_id : str
        Fixed client id; the broker keeps the session under it.
    host, port : str, int
    protocol : str
        ``"3.1.1"`` or ``"5"``.
    keepalive_s : int
    ca_file : str, optional
        CA certificate(s) in PEM; setting it turns TLS on.
    cert_file, key_file : str, optional
        Client certificate and key for brokers that require one.
    username : str, optional
    password_env : str, optional
        Name of the environment variable holding the password.
    password_file : str, optional
        File whose first line is the password.
    session_expiry_s : int
        MQTT 5: how long the broker keeps the session after a disconnect.
    receive_maximum : int
        MQTT 5: unacknowledged QoS 1 messages the broker may send at once.
    reconnect_min_s, reconnect_max_s : int
        Backoff between reconnect attempts (doubling).
    """

    client_id: str
    host: str = "127.0.0.1"
    port: int = 1883
    protocol: str = "5"
    keepalive_s: int = 30
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    username: str | None = None
    password_env: str | None = None
    password_file: str | None = None
    session_expiry_s: int = 86400
    receive_maximum: int = 1000
    reconnect_min_s: int = 1
    reconnect_max_s: int = 30

    def __post_init__(self) -> None:
        # Everything paho would refuse, or only find out about in its network
        # thread, is checked here: a paho client owns sockets from its constructor on.
        if not isinstance(self.client_id, str) or not self.client_id:
            raise ConfigError("mqtt.client_id: expected a fixed, non-empty client id (the session is kept under it)")
        if len(self.client_id.encode("utf-8")) > MAX_STRING_BYTES:
            raise ConfigError(f"mqtt.client_id: at most {MAX_STRING_BYTES} bytes in UTF-8 (an MQTT string)")
        if not isinstance(self.host, str) or not self.host.strip():
            raise ConfigError(f"mqtt.host: expected a host name or IP address, got {self.host!r}")
        for key, low, high in _INTEGER_RANGES:
            value = getattr(self, key)
            if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
                raise ConfigError(f"mqtt.{key}: expected an integer in {low}..{high}, got {value!r}")
        if self.protocol not in PROTOCOLS:
            raise ConfigError(f"mqtt.protocol: expected '3.1.1' or '5', got {self.protocol!r}")
        if not isinstance(self.port, int) or not 0 < self.port < 65536:
            raise ConfigError(f"mqtt.port: expected 1..65535, got {self.port!r}")
        if self.password_env and self.password_file:
            raise ConfigError("mqtt: give password_env or password_file, not both")
        if (self.password_env or self.password_file) and not self.username:
            raise ConfigError("mqtt: a password needs a username")
        if (self.cert_file is None) != (self.key_file is None):
            raise ConfigError("mqtt: cert_file and key_file go together")
        if self.cert_file and not self.ca_file:
            raise ConfigError("mqtt: a client certificate needs ca_file (TLS)")
        if self.protocol == "5" and self.session_expiry_s <= 0:
            raise ConfigError("mqtt.session_expiry_s: must be above 0 with MQTT 5, or the session ends at disconnect")
        if not 1 <= self.receive_maximum <= 65535:
            raise ConfigError(f"mqtt.receive_maximum: expected 1..65535, got {self.receive_maximum!r}")
        if self.reconnect_min_s < 1 or self.reconnect_max_s < self.reconnect_min_s:
            raise ConfigError("mqtt: expected 1 <= reconnect_min_s <= reconnect_max_s")

    @classmethod
    def from_mapping(cls, config: Mapping[str, Any], where: str = "mqtt") -> "MqttSettings":
        if "password" in config:
            raise ConfigError(f"{where}: put the password in password_env or password_file, not in the config")
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(config) - known)
        if unknown:
            raise ConfigError(f"{where}: unknown key(s) {unknown}; expected some of {sorted(known)}")
        return cls(**dict(config))

    @property
    def tls(self) -> bool:
        return self.ca_file is not None

    @property
    def address(self) -> str:
        return f"{'mqtts' if self.tls else 'mqtt'}://{self.host}:{self.port}"


def read_password(settings: MqttSettings) -> str | None:
    """The password from ``password_env`` or ``password_file`` (never logged)."""
    if settings.password_env:
        value = os.environ.get(settings.password_env)
        if value is None:
            raise ConfigError(f"mqtt.password_env: environment variable {settings.password_env!r} is not set")
        return value
    if settings.password_file:
        try:
            with open(settings.password_file, encoding="utf-8") as handle:
                line = handle.readline()
        except OSError as exc:
            raise ConfigError(f"mqtt.password_file: cannot read {settings.password_file!r}: {exc.strerror}") from exc
        value = line.rstrip("\r\n")
        if not value:
            raise ConfigError(f"mqtt.password_file: {settings.password_file!r} has an empty first line")
        return value
    return None


class RecordingClient(mqtt.Client):
    """A paho client that remembers why the last connection attempt failed.

    paho's network thread swallows the ``OSError`` of a failed (re)connect
    (TLS verification, refused connection) after calling ``on_connect_fail``
    without it; this keeps its text for logs and :class:`SourceError`s.
    """

    last_connect_error: str | None = None

    def reconnect(self) -> Any:
        try:
            result = super().reconnect()
        except OSError as exc:
            self.last_connect_error = f"{type(exc).__name__}: {exc}"
            raise
        self.last_connect_error = None
        return result


class _ClosingSSLSocket(ssl.SSLSocket):
    """Closes itself when the handshake fails (paho would leave it open)."""

    def do_handshake(self, block: bool = False) -> None:
        try:
            super().do_handshake(block)
        except BaseException:
            self.close()
            raise


def tls_context(settings: MqttSettings) -> ssl.SSLContext:
    """Client TLS context: the configured CA only, certificate and hostname checked."""
    try:
        context = ssl.create_default_context(ssl.Purpose.SERVER_AUTH, cafile=settings.ca_file)
        if settings.cert_file:
            context.load_cert_chain(settings.cert_file, settings.key_file)
    except (OSError, ssl.SSLError, ValueError) as exc:
        raise ConfigError(f"mqtt TLS files (ca_file/cert_file/key_file) cannot be loaded: {exc}") from exc
    context.check_hostname = True
    context.verify_mode = ssl.CERT_REQUIRED
    context.sslsocket_class = _ClosingSSLSocket
    return context


def build_client(settings: MqttSettings, *, manual_ack: bool = False) -> RecordingClient:
    """A paho client with protocol, session, TLS, credentials and backoff set.

    Notes
    -----
    Call :func:`connect_async` next, then ``loop_start()``.
    """
    protocol = PROTOCOLS[settings.protocol]
    kwargs: dict[str, Any] = {
        "callback_api_version": CallbackAPIVersion.VERSION2,
        "client_id": settings.client_id,
        "protocol": protocol,
        "manual_ack": manual_ack,
    }
    if protocol == mqtt.MQTTv311:
        kwargs["clean_session"] = False
    # Everything that can fail on bad settings comes before the client exists:
    # a paho client owns sockets from its constructor on.
    context = tls_context(settings) if settings.tls else None
    password = read_password(settings)
    client = RecordingClient(**kwargs)
    client.enable_logger(logging.getLogger("leadline.sources.mqtt.paho"))
    if context is not None:
        client.tls_set_context(context)
    if settings.username:
        client.username_pw_set(settings.username, password)
    client.reconnect_delay_set(settings.reconnect_min_s, settings.reconnect_max_s)
    return client


def connect_async(client: mqtt.Client, settings: MqttSettings) -> None:
    """Start connecting in the background; a broker that is down is retried.

    Raises
    ------
    ConfigError
        When paho refuses the settings (its ValueError or TypeError, chained).
    """
    try:
        if settings.protocol == "5":
            properties = Properties(PacketTypes.CONNECT)
            properties.SessionExpiryInterval = settings.session_expiry_s
            properties.ReceiveMaximum = settings.receive_maximum
            client.connect_async(
                settings.host, settings.port, settings.keepalive_s, clean_start=False, properties=properties
            )
        else:
            client.connect_async(settings.host, settings.port, settings.keepalive_s)
    except (ValueError, TypeError) as exc:
        raise ConfigError(f"mqtt {settings.address}: paho-mqtt refused the connection settings: {exc}") from exc
