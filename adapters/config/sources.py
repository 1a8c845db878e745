"""Config sources: ``[[sources.csv]]`` and ``[[sources.mqtt]]`` entries, read and checked.

The schema of each entry is in :mod:`leadline.adapters.config.file`. Each entry
becomes a frozen dataclass that builds the adapter objects the service
needs (:meth:`CsvSourceConfig.layout`, :meth:`MqttSourceConfig.settings`,
:meth:`MqttSourceConfig.subscriptions`); building them is also the last
check of an entry, so what the adapters refuse is reported at load time
with the entry's key path.
"""

from __future__ import annotations

import glob
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

from leadline.detector.errors import ConfigError

from .values import (
    Bad,
    Problems,
    TableReader,
    boolean,
    choice,
    choices_text,
    did_you_mean,
    integer,
    list_of,
    relative_to,
    text,
    zone_name,
)

_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]*\Z")
TIME_FORMATS = ("iso8601", "epoch_s", "epoch_ms")
PAYLOADS = ("number", "json", "senml")
PROTOCOLS = ("5", "3.1.1")
CSV_KEYS = ("name", "path", "format", "columns", "header", "column_names", "feed_prefix", "delimiter", "decimal",
            "time_format", "timezone", "from_start", "max_feeds")
MQTT_KEYS = ("name", "host", "port", "client_id", "protocol", "tls", "username", "password_env", "password_file",
             "keepalive_s", "session_expiry_s", "receive_maximum", "queue_size", "topics", "max_topic_bytes",
             "max_feeds")
TOPIC_KEYS = ("pattern", "feed", "payload", "value_path", "time_path", "time_format", "timezone", "qos", "use_sum")
TLS_KEYS = ("ca_file", "cert_file", "key_file")


@dataclass(frozen=True)
class CsvSourceConfig:
    """One ``[[sources.csv]]`` entry (``path`` is absolute)."""

    name: str
    path: str
    format: str = "long"
    time_column: str = "timestamp"
    feed_column: str = "feed"
    value_column: str = "value"
    feed_columns: Mapping[str, str] | None = None
    header: bool = True
    column_names: tuple[str, ...] | None = None
    feed_prefix: str = ""
    delimiter: str = ","
    decimal: str = "."
    time_format: str = "iso8601"
    timezone: str | None = None
    from_start: bool = False
    max_feeds: int = 100_000

    def layout(self):
        """The :class:`~leadline.adapters.sources.csv_rows.CsvLayout` of these files."""
        from ..sources.csv_rows import CsvLayout

        return CsvLayout(
            layout=self.format, delimiter=self.delimiter, decimal=self.decimal, has_header=self.header,
            column_names=self.column_names, time_column=self.time_column, feed_column=self.feed_column,
            value_column=self.value_column, feed_columns=None if self.feed_columns is None else dict(self.feed_columns),
            feed_prefix=self.feed_prefix, time_format=self.time_format, time_zone=self.timezone,
        )


@dataclass(frozen=True)
class TopicConfig:
    """One entry of an MQTT source's ``topics``."""

    pattern: str
    feed: str | None = None
    payload: str = "number"
    value_path: str | tuple[str | int, ...] = "value"
    time_path: str | tuple[str | int, ...] | None = None
    time_format: str = "iso8601"
    timezone: str | None = None
    qos: int = 1
    use_sum: bool = False

    def subscription(self):
        """The :class:`~leadline.adapters.sources.mqtt_subscriber.Subscription` for this entry."""
        from ..sources.mqtt_subscriber import Subscription
        from ..sources.payloads import JsonPayload, NumberPayload
        from ..sources.senml import SenmlPayload
        from ..sources.topics import TopicPattern

        if self.payload == "json":
            parser: Any = JsonPayload(self.value_path, self.time_path, self.time_format, self.timezone)
        elif self.payload == "senml":
            parser = SenmlPayload(use_sum=self.use_sum)
        else:
            parser = NumberPayload()
        return Subscription(TopicPattern(self.pattern, self.feed), parser, self.qos)


@dataclass(frozen=True)
class MqttSourceConfig:
    """One ``[[sources.mqtt]]`` entry (file paths are absolute)."""

    name: str
    client_id: str
    topics: tuple[TopicConfig, ...]
    host: str = "127.0.0.1"
    port: int = 1883
    protocol: str = "5"
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    username: str | None = None
    password_env: str | None = None
    password_file: str | None = None
    keepalive_s: int = 30
    session_expiry_s: int = 86400
    receive_maximum: int = 1000
    queue_size: int = 10_000
    max_topic_bytes: int = 256
    max_feeds: int = 100_000

    def settings(self, client_id: str | None = None):
        """The :class:`~leadline.adapters.sources.mqtt_connection.MqttSettings` (another client id if given)."""
        from ..sources.mqtt_connection import MqttSettings

        return MqttSettings(
            client_id=client_id or self.client_id, host=self.host, port=self.port, protocol=self.protocol,
            keepalive_s=self.keepalive_s, ca_file=self.ca_file, cert_file=self.cert_file, key_file=self.key_file,
            username=self.username, password_env=self.password_env, password_file=self.password_file,
            session_expiry_s=self.session_expiry_s, receive_maximum=self.receive_maximum,
        )

    def subscriptions(self) -> list[Any]:
        return [t.subscription() for t in self.topics]


def _source_name(reader: TableReader, seen: dict[str, str]) -> str | None:
    def check(value: Any) -> str:
        if not isinstance(value, str) or not _NAME.match(value):
            raise Bad("a name of letters, digits, '.', '_' and '-', starting with a letter or digit")
        return value

    name = reader.get("name", check, required=True)
    if name is not None:
        if name in seen:
            reader.problems.error(reader.key("name"), f"{name!r} is already the name of {seen[name]}; "
                                                      "source names must be unique")
        seen[name] = reader.path
    return name


def read_sources(root: TableReader, base: Path, problems: Problems) -> tuple[list[Any], list[Any], list[str]]:
    """The valid CSV and MQTT entries, and the names of all MQTT entries (valid or not)."""
    sources = root.table("sources", ("csv", "mqtt"))
    if sources is None:
        return [], [], []
    seen: dict[str, str] = {}
    csv_sources = [c for r in sources.tables("csv", CSV_KEYS) if (c := _read_csv(r, base, seen)) is not None]
    # "password" is allowed through to get its own message
    mqtt_readers = sources.tables("mqtt", (*MQTT_KEYS, "password"))
    mqtt_sources = [m for r in mqtt_readers if (m := _read_mqtt(r, base, seen)) is not None]
    mqtt_names = [r.node["name"] for r in mqtt_readers if isinstance(r.node.get("name"), str)]
    return csv_sources, mqtt_sources, mqtt_names


def _time_format(value: Any) -> str:
    if isinstance(value, str) and (value in TIME_FORMATS or "%" in value):
        return value
    raise Bad(f"{choices_text(TIME_FORMATS)}, or a strptime pattern such as \"%d.%m.%Y %H:%M\"",
              did_you_mean(value, TIME_FORMATS) if isinstance(value, str) else "")


def _one_char(value: Any) -> str:
    if not isinstance(value, str) or len(value) != 1 or value in "\r\n\"":
        raise Bad('one character such as "," or ";" (not a quote or newline)')
    return value


def _read_csv(reader: TableReader, base: Path, seen: dict[str, str]) -> CsvSourceConfig | None:
    problems = reader.problems
    name = _source_name(reader, seen)
    path = reader.get("path", text(), required=True, required_hint="a file or glob such as /srv/telemetry/*.csv")
    fmt = reader.get("format", choice("long", "wide"), "long")
    header = reader.get("header", boolean, True)
    column_names = reader.get("column_names", list_of(text(), nonempty=True, what="column names"))
    if not header and column_names is None:
        problems.error(reader.key("column_names"), "required when header = false: the names of the columns")
    cols_allowed = ("time", "feed", "value") if fmt == "long" else ("time", "feeds")
    columns = reader.table("columns", cols_allowed)
    time_column, feed_column, value_column, feed_columns = "timestamp", "feed", "value", None
    if columns is not None:
        time_column = columns.get("time", text(), "timestamp")
        feed_column = columns.get("feed", text(), "feed")
        value_column = columns.get("value", text(), "value")
        feeds = columns.table("feeds", None)
        if feeds is not None and feeds.ok:
            feed_columns = {}
            for column in feeds.node:
                feed_id = feeds.get(column, text(), None)
                if feed_id is not None:
                    feed_columns[column] = feed_id
            if not feed_columns:
                problems.error(feeds.path, 'expected at least one "file column" = "feed id" entry')
    entry = dict(
        format=fmt, time_column=time_column, feed_column=feed_column, value_column=value_column,
        feed_columns=feed_columns, header=header, column_names=None if column_names is None else tuple(column_names),
        feed_prefix=reader.get("feed_prefix", text(nonempty=False), ""),
        delimiter=reader.get("delimiter", _one_char, ","),
        decimal=reader.get("decimal", choice(".", ","), "."),
        time_format=reader.get("time_format", _time_format, "iso8601"),
        timezone=reader.get("timezone", zone_name, None),
        from_start=reader.get("from_start", boolean, False),
        max_feeds=reader.get("max_feeds", integer(1, 100_000_000), 100_000),
    )
    if name is None or path is None:
        return None
    config = CsvSourceConfig(name=name, path=relative_to(base, path), **entry)
    if entry["decimal"] == entry["delimiter"]:
        problems.error(reader.key("decimal"), f"{entry['decimal']!r} is also the delimiter; "
                                              'with a decimal comma use delimiter = ";"')
        return None
    try:
        config.layout()
    except ConfigError as exc:
        problems.error(reader.path, str(exc))
        return None
    if not glob.glob(config.path):
        problems.warn(reader.key("path"), f"{config.path!r} matches no file yet; the source waits for files to appear")
    return config


def _path_part(value: Any) -> Any:
    if isinstance(value, str) and value.strip():
        return value
    if isinstance(value, list) and value and all(
        (isinstance(p, str) and p) or (isinstance(p, int) and not isinstance(p, bool) and p >= 0) for p in value
    ):
        return tuple(value)
    raise Bad('a dotted path such as "data.flow", or a list of keys and indexes such as ["data", "flow.m3", 0]')


def _protocol(value: Any) -> str:
    if isinstance(value, str) and value in PROTOCOLS:
        return value
    if not isinstance(value, bool) and value in (5, 3.1):
        raise Bad(choices_text(PROTOCOLS), 'write it in quotes, as text: protocol = "5" or "3.1.1"')
    raise Bad(choices_text(PROTOCOLS), did_you_mean(value, PROTOCOLS) if isinstance(value, str) else "")


def _read_topic(reader: TableReader) -> TopicConfig | None:
    problems = reader.problems
    pattern = reader.get("pattern", text(), required=True, required_hint='such as "plant/+site/flow/+meter"')
    feed = reader.get("feed", text(), None)
    payload = reader.get("payload", choice(*PAYLOADS), "number")
    for key, only in (("value_path", "json"), ("time_path", "json"), ("time_format", "json"), ("timezone", "json"),
                      ("use_sum", "senml")):
        if reader.has(key) and payload != only:
            problems.error(reader.key(key), f'applies only to payload = "{only}" (this topic has "{payload}")')
    entry = TopicConfig(
        pattern=pattern or "#",
        feed=feed,
        payload=payload,
        value_path=reader.get("value_path", _path_part, "value"),
        time_path=reader.get("time_path", _path_part, None),
        time_format=reader.get("time_format", choice(*TIME_FORMATS), "iso8601"),
        timezone=reader.get("timezone", zone_name, None),
        qos=reader.get("qos", integer(0, 1), 1),
        use_sum=reader.get("use_sum", boolean, False),
    )
    if pattern is None:
        return None
    try:
        entry.subscription()
    except ConfigError as exc:
        problems.error(reader.key("pattern"), str(exc))
        return None
    return entry


def _read_mqtt(reader: TableReader, base: Path, seen: dict[str, str]) -> MqttSourceConfig | None:
    problems = reader.problems
    if reader.has("password"):
        problems.error(reader.key("password"), "a password does not belong in the config file; give password_env "
                                               "(an environment variable) or password_file instead")
    name = _source_name(reader, seen)
    client_id = reader.get("client_id", text(), required=True,
                           required_hint="fixed, so that the broker keeps the session and its queue")
    tls = reader.table("tls", TLS_KEYS)
    files: dict[str, str | None] = {"ca_file": None, "cert_file": None, "key_file": None}
    if tls is not None:
        for key in TLS_KEYS:
            value = tls.get(key, text(), None, required=key == "ca_file")
            files[key] = None if value is None else relative_to(base, value)
        if (files["cert_file"] is None) != (files["key_file"] is None):
            problems.error(tls.path, "cert_file and key_file go together: give both or neither")
    password_file = reader.get("password_file", text(), None)
    fields_ = dict(
        host=reader.get("host", text(), "127.0.0.1"),
        port=reader.get("port", integer(1, 65535), 8883 if tls is not None else 1883),
        protocol=reader.get("protocol", _protocol, "5"),
        username=reader.get("username", text(), None),
        password_env=reader.get("password_env", text(), None),
        password_file=None if password_file is None else relative_to(base, password_file),
        keepalive_s=reader.get("keepalive_s", integer(5, 65535), 30),
        session_expiry_s=reader.get("session_expiry_s", integer(0, 2**32 - 1), 86400),
        receive_maximum=reader.get("receive_maximum", integer(1, 65535), 1000),
        queue_size=reader.get("queue_size", integer(1, 10_000_000), 10_000),
        max_topic_bytes=reader.get("max_topic_bytes", integer(1, 65535), 256),
        max_feeds=reader.get("max_feeds", integer(1, 100_000_000), 100_000),
        **files,
    )
    topic_readers = reader.tables("topics", TOPIC_KEYS)
    if not reader.has("topics"):
        problems.error(reader.key("topics"), 'required: at least one { pattern = "..." } to subscribe to')
    elif not topic_readers and isinstance(reader.node.get("topics"), list):
        problems.error(reader.key("topics"), "is empty: give at least one topic pattern")
    topics = [t for r in topic_readers if (t := _read_topic(r)) is not None]
    if name is None or client_id is None or len(topics) != len(topic_readers) or not topics:
        return None
    config = MqttSourceConfig(name=name, client_id=client_id, topics=tuple(topics), **fields_)
    try:
        config.settings()
    except ConfigError as exc:
        problems.error(reader.path, str(exc))
        return None
    if config.password_env and config.password_env not in os.environ:
        problems.warn(reader.key("password_env"), f"environment variable {config.password_env!r} is not set here; "
                                                  "the service needs it (systemd: Environment= or EnvironmentFile=)")
    for key in ("ca_file", "cert_file", "key_file", "password_file"):
        value = getattr(config, key)
        if value is not None and not os.path.exists(value):
            where = reader.key(key) if key == "password_file" else f"{reader.path}.tls.{key}"
            problems.warn(where, f"{value!r} does not exist here")
    return config

