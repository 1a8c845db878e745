"""The TOML config file: reading and checking it (the schema, every table and key, is in :mod:`.keys`)."""

from __future__ import annotations

import copy
import os
import tomllib
from dataclasses import dataclass, field
from datetime import time
from pathlib import Path
from typing import Any, Mapping
from zoneinfo import ZoneInfo

from leadline.detector.errors import ConfigError, StoreError

from . import feeds as config_feeds
from .feeds import FeedOverride, cross_check, merge, read_options, read_override
from .sources import CsvSourceConfig, MqttSourceConfig, TopicConfig, read_sources
from .shelving import SHELVING_KEYS, ShelvingConfig, read_shelving
from .site import SITE_KEYS, SiteConfig, read_site
from .values import (
    Bad,
    Problems,
    TableReader,
    boolean,
    choices_text,
    did_you_mean,
    duration_s,
    integer,
    number,
    text,
    zone_name,
)
from .state_dir import default_store_path

from .keys import (_SHIFT_NAME, _SHIFT_TIMES, RESERVED_SHIFT_NAMES, TOP_KEYS, STORE_KEYS, REFIT_KEYS, PUBLISH_KEYS, EVENT_TOPIC_FIELDS)  # noqa: F401 (re-exported)


def available_cores() -> int:
    """Cores this process may run on (its CPU affinity where the OS tells)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


# ============================================================================ dataclasses
@dataclass(frozen=True)
class StoreConfig:
    """``[store]``: where events go. ``url`` is absolute for SQLite files."""

    url: str = field(repr=False)
    flush_interval_s: float = 1.0
    flush_events: int = 500
    retry_base_s: float = 1.0
    retry_cap_s: float = 60.0
    journal: bool = True
    snapshot_interval_s: float = 30.0
    snapshot_readings: int = 100_000
    snapshot_max_feeds: int = 2_000

    @property
    def safe_url(self) -> str:
        """The URL with any password hidden."""
        from ..store.connect import resolve_url, safe_url

        return safe_url(resolve_url(self.url))

    @property
    def sqlite_path(self) -> Path | None:
        """The database file for SQLite, else None."""
        from ..store.connect import resolve_url

        parsed = resolve_url(self.url)
        return Path(parsed.database) if parsed.get_backend_name() == "sqlite" else None


@dataclass(frozen=True)
class RefitConfig:
    """``[refit]``. ``window_points``/``window_span_s`` None: the feed's training window."""

    every_s: float = 86400.0
    on_degraded: bool = True
    window_points: int | None = None
    window_span_s: float | None = None
    workers: int = 1
    install_delay_slots: int = 10


@dataclass(frozen=True)
class PublishConfig:
    """``[publish]``: alarms to MQTT through the broker of source ``broker``."""

    broker: str
    client_id: str
    topic_template: str = "leadline/alarms/{feed}/{rule}"
    status_topic_template: str = "leadline/status/{feed}"
    max_queued_messages: int = 10_000


@dataclass(frozen=True)
class Shift:
    """One operator shift, in the local time of :attr:`ShiftsConfig.timezone`.

    ``end <= start`` means the shift ends on the next day (``end == start``:
    a 24-hour shift).
    """

    name: str
    start: time
    end: time

    @property
    def overnight(self) -> bool:
        return self.end <= self.start

    @property
    def label(self) -> str:
        return f"{self.start:%H:%M}-{self.end:%H:%M}"


@dataclass(frozen=True)
class ShiftsConfig:
    """``[shifts]``: the zone of the shift times, and the shifts in file order."""

    timezone: str = "UTC"
    shifts: tuple[Shift, ...] = ()

    @property
    def zone(self) -> ZoneInfo:
        return ZoneInfo(self.timezone)

    def get(self, name: str) -> Shift | None:
        for shift in self.shifts:
            if shift.name == name:
                return shift
        return None


@dataclass(frozen=True)
class Config:
    """A checked config file.

    Attributes
    ----------
    path : Path
        The file it was read from (absolute).
    store : StoreConfig
    csv_sources, mqtt_sources : tuple
    feed_defaults : dict
        The resolved defaults (built-in ones with ``[feeds.defaults]`` applied).
    feed_overrides : tuple of FeedOverride
    feed_defaults_given : dict
        The options ``[feeds.defaults]`` itself sets (for naming them in messages).
    refit : RefitConfig
    publish : PublishConfig or None
    shifts : ShiftsConfig or None
    shelving : ShelvingConfig
        ``[shelving] max_duration``: the longest shelving (default 7 days).
    site : SiteConfig or None
        The site's false-alarm budget (:mod:`.site`), already applied to ``feed_defaults``.
    warnings : tuple of str
        Problems that do not stop the service.
    """

    path: Path
    store: StoreConfig
    csv_sources: tuple[CsvSourceConfig, ...] = ()
    mqtt_sources: tuple[MqttSourceConfig, ...] = ()
    feed_defaults: Mapping[str, Any] = field(default_factory=lambda: dict(config_feeds.BUILTIN_DEFAULTS))
    feed_overrides: tuple[FeedOverride, ...] = ()
    feed_defaults_given: Mapping[str, Any] = field(default_factory=dict)
    refit: RefitConfig = field(default_factory=RefitConfig)
    publish: PublishConfig | None = None
    shifts: ShiftsConfig | None = None
    shelving: ShelvingConfig = field(default_factory=ShelvingConfig)
    site: SiteConfig | None = None
    warnings: tuple[str, ...] = ()

    @property
    def sources(self) -> tuple[CsvSourceConfig | MqttSourceConfig, ...]:
        return (*self.csv_sources, *self.mqtt_sources)

    def source(self, name: str) -> CsvSourceConfig | MqttSourceConfig:
        for s in self.sources:
            if s.name == name:
                return s
        hint = did_you_mean(name, [s.name for s in self.sources])
        raise ConfigError(f"{self.path}: no source named {name!r}" + (f"; {hint}" if hint else ""))

    def publisher_settings(self):
        """The alarm publisher's :class:`~leadline.adapters.sources.mqtt_connection.MqttSettings`:
        the ``[publish]`` broker entry's connection with the publisher's own client id; None
        without ``[publish]``."""
        if self.publish is None:
            return None
        broker = self.source(self.publish.broker)
        return broker.settings(client_id=self.publish.client_id)

    def overrides_for(self, feed_id: str) -> list[FeedOverride]:
        return [o for o in self.feed_overrides if o.matches(feed_id)]

    def feed_settings(self, feed_id: str) -> dict[str, Any]:
        """The resolved options of one feed, as plain data (a fresh dict per call).

        The keys are those of :data:`.feeds.BUILTIN_DEFAULTS` plus
        ``overrides``: the key paths of the overrides that applied. ``limits``
        holds only the keys the feed's threshold mode uses: in sigma mode
        the arguments of :func:`~leadline.detector.rules.thresholds.sigma_thresholds`,
        in budget mode those of
        :func:`~leadline.detector.rules.thresholds.budget_thresholds` (a
        sigma-only limit inherited from a layer before the one that chose
        budget mode is dropped).

        Raises
        ------
        ConfigError
            When the overrides that match this feed combine into options
            that do not go together (each one alone was checked at load).
        """
        layers = [("feeds.defaults", self.feed_defaults_given)]
        resolved = copy.deepcopy(dict(self.feed_defaults))
        applied = []
        for override in self.overrides_for(feed_id):
            resolved = merge(resolved, override.options)
            layers.append((override.path, override.options))
            applied.append(override.path)
        if len(applied) > 1:
            problems = Problems()
            cross_check(resolved, layers, problems, context=f"for feed {feed_id!r}")
            if problems.errors:
                raise ConfigError(_message(self.path, problems.errors))
        resolved["limits"] = config_feeds.usable_limits(resolved)
        resolved["overrides"] = applied
        return resolved


# ============================================================================ loading
def load_config(path: str | os.PathLike[str]) -> Config:
    """Read and check a config file.

    Raises
    ------
    ConfigError
        The file cannot be read, is not TOML, or has problems (all of them
        are listed, one per line).
    """
    file = Path(path).expanduser().resolve()
    try:
        data = file.read_bytes()
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the config file: {exc.strerror}") from exc
    try:
        text_ = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: the config file is not UTF-8 text ({exc})") from exc
    return config_from_text(text_, file)


def config_from_text(source: str, path: str | os.PathLike[str]) -> Config:
    """Check TOML text as if read from ``path`` (relative paths are taken from its folder)."""
    file = Path(path).expanduser().absolute()
    try:
        document = tomllib.loads(source)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{file}: not valid TOML: {exc}") from exc
    problems = Problems()
    config = _read(document, file, problems)
    if problems.errors:
        raise ConfigError(_message(file, problems.errors))
    return config


def _message(file: Path, errors: list[str]) -> str:
    if len(errors) == 1:
        return f"{file}: {errors[0]}"
    return f"{file}: {len(errors)} problems:\n" + "\n".join(f"  {e}" for e in errors)


def _read(document: dict[str, Any], file: Path, problems: Problems) -> Config:
    base = file.parent
    root = TableReader(problems, document, "", TOP_KEYS)
    store = _read_store(root.table("store", STORE_KEYS), base, problems)
    csv_sources, mqtt_sources, mqtt_names = read_sources(root, base, problems)
    defaults, given, overrides = _read_feeds(root, problems)
    refit = _read_refit(root.table("refit", REFIT_KEYS), problems)
    publish = _read_publish(root.table("publish", PUBLISH_KEYS), mqtt_sources, mqtt_names, problems)
    shifts = _read_shifts(root, problems)
    shelving = read_shelving(root.table("shelving", SHELVING_KEYS))
    named = {f for c in csv_sources for f in (c.feed_columns or {}).values()}
    site = read_site(root.table("site", SITE_KEYS), len(named), problems)
    if site is not None:
        if "false_alarms_per_week" in given:
            problems.error("feeds.defaults.false_alarms_per_week",
                           "set either this or [site] false_alarms_per_operator_hour, which shares the site's "
                           "budget among the feeds")
        else:
            defaults = {**defaults, "false_alarms_per_week": site.per_feed_per_week}
    return Config(
        path=file, store=store, csv_sources=tuple(csv_sources), mqtt_sources=tuple(mqtt_sources),
        feed_defaults=defaults, feed_overrides=tuple(overrides), feed_defaults_given=given, refit=refit,
        publish=publish, shifts=shifts, shelving=shelving, site=site,
        warnings=tuple(problems.warnings),
    )


# ---------------------------------------------------------------------------- [store]
def _read_store(reader: TableReader | None, base: Path, problems: Problems) -> StoreConfig:
    default_url = f"sqlite:///{default_store_path(base)}"
    if reader is None:
        return StoreConfig(default_url)
    url = reader.get("url", text(), default=None)
    resolved = default_url if url is None else _store_url(url, base, reader, problems)
    retry_base_s = reader.get("retry_base_s", number(0, 3600, low_open=True), 1.0)
    retry_cap_s = reader.get("retry_cap_s", number(0, 86400, low_open=True), 60.0)
    if retry_cap_s < retry_base_s:
        problems.bad_value(reader.key("retry_cap_s"), retry_cap_s,
                           f"a number of seconds >= retry_base_s ({retry_base_s})")
        retry_cap_s = retry_base_s
    return StoreConfig(
        url=resolved or default_url,
        flush_interval_s=reader.get("flush_interval_s", number(0, 3600, low_open=True), 1.0),
        flush_events=reader.get("flush_events", integer(1, 1_000_000), 500),
        retry_base_s=retry_base_s,
        retry_cap_s=retry_cap_s,
        journal=reader.get("journal", boolean, True),
        snapshot_interval_s=reader.get("snapshot_interval_s", number(0, 86400, low_open=True), 30.0),
        snapshot_readings=reader.get("snapshot_readings", integer(1, 100_000_000), 100_000),
        snapshot_max_feeds=reader.get("snapshot_max_feeds", integer(1, 100_000_000), 2_000),
    )


def _store_url(url: str, base: Path, reader: TableReader, problems: Problems) -> str | None:
    from ..store.connect import resolve_url

    try:
        parsed = resolve_url(url)
    except StoreError as exc:
        problems.bad_value(reader.key("url"), url,
                           'an SQLite file path, "sqlite:///path.db" or "postgresql+psycopg://user@host:5432/db"',
                           str(exc))
        return None
    if parsed.get_backend_name() == "sqlite":
        database = Path(parsed.database).expanduser()
        if not database.is_absolute():
            parsed = parsed.set(database=str(base / database))
    elif parsed.password:
        problems.warn(reader.key("url"), "holds a password; prefer ~/.pgpass or the PGPASSWORD environment variable")
    return parsed.render_as_string(hide_password=False)



# ---------------------------------------------------------------------------- [feeds]
def _read_feeds(root: TableReader, problems: Problems) -> tuple[dict[str, Any], dict[str, Any], list[FeedOverride]]:
    feeds = root.table("feeds", ("defaults", "override"))
    builtin = dict(config_feeds.BUILTIN_DEFAULTS)
    if feeds is None:
        return builtin, {}, []
    allowed = config_feeds.FEED_KEYS
    defaults_reader = feeds.table("defaults", allowed)
    explicit = read_options(defaults_reader) if defaults_reader is not None else {}
    defaults = merge(builtin, explicit)
    base_layer = [("feeds.defaults", explicit)]
    cross_check(defaults, base_layer, problems)
    overrides = []
    for reader in feeds.tables("override", ("match", *allowed)):
        override = read_override(reader)
        if override is None:
            continue
        if not override.options:
            problems.error(reader.path, "sets no option; give at least one key besides match")
        cross_check(merge(defaults, override.options), [*base_layer, (override.path, override.options)], problems)
        overrides.append(override)
    if not any(key in layer for layer in [explicit, *(o.options for o in overrides)]
               for key in ("timezone", "utc_offset", "utc_offset_s")):
        problems.warn("feeds.defaults.timezone",
                      "not set: daily and weekly cycles are fitted on UTC; a site whose demand follows local "
                      'time sets its IANA zone once here (for example timezone = "Europe/London"), or the '
                      "cycles are an hour off after each change of summer time")
    return defaults, explicit, overrides


# ---------------------------------------------------------------------------- [refit]
def _read_refit(reader: TableReader | None, problems: Problems) -> RefitConfig:
    cores = available_cores()
    default_workers = max(1, cores - 1)
    if reader is None:
        return RefitConfig(workers=default_workers)
    workers = reader.get("workers", integer(1), default_workers)
    if workers > cores:
        problems.bad_value(reader.key("workers"), workers, f"an integer from 1 to {cores} (this machine's cores): "
                                                           "at most one refit process per core")
        workers = default_workers
    return RefitConfig(
        every_s=reader.get("every", duration_s, 86400.0),
        on_degraded=reader.get("on_degraded", boolean, True),
        window_points=reader.get("window_points", integer(config_feeds.MIN_TRAIN_POINTS), None),
        window_span_s=reader.get("window_span", duration_s, None),
        workers=workers,
        install_delay_slots=reader.get("install_delay_slots", integer(0, 1_000_000), 10),
    )


# ---------------------------------------------------------------------------- [publish]
def _topic_template(allowed: tuple[str, ...]) -> Any:
    import string

    others = [f"{{{a}}}" for a in allowed if a != "feed"]
    expected = "a topic template containing {feed}" + (f" and optionally {', '.join(others)}" if others else "")
    expected += ", without '+', '#' or NUL"

    def check(value: Any) -> str:
        if not isinstance(value, str) or not value or "+" in value or "#" in value or "\0" in value:
            raise Bad(expected)
        try:
            names = [f for _, f, _, _ in string.Formatter().parse(value) if f is not None]
        except ValueError as exc:
            raise Bad(expected, str(exc)) from exc
        if "feed" not in names:
            raise Bad(expected, "{feed} is missing")
        for name in names:
            if name not in allowed:
                hint = did_you_mean(name, allowed)
                raise Bad(expected, f"{{{name}}} is not known" + (f"; {hint}" if hint else ""))
        return value

    return check


def _read_publish(reader: TableReader | None, mqtt_sources: list[MqttSourceConfig], names: list[str],
                  problems: Problems) -> PublishConfig | None:
    if reader is None:
        return None

    def broker_name(value: Any) -> str:
        if isinstance(value, str) and value in names:
            return value
        if not names:
            raise Bad("the name of a [[sources.mqtt]] entry, but none is defined")
        raise Bad(f"the name of a [[sources.mqtt]] entry: {choices_text(names)}",
                  did_you_mean(value, names) if isinstance(value, str) else "")

    broker = reader.get("broker", broker_name, required=True)
    client_id = reader.get("client_id", text(), None)
    entry = dict(
        topic_template=reader.get("topic_template", _topic_template(EVENT_TOPIC_FIELDS),
                                  "leadline/alarms/{feed}/{rule}"),
        status_topic_template=reader.get("status_topic_template", _topic_template(("feed",)), "leadline/status/{feed}"),
        max_queued_messages=reader.get("max_queued_messages", integer(1, 10_000_000), 10_000),
    )
    source = next((m for m in mqtt_sources if m.name == broker), None)
    if source is None:  # missing, unknown, or an entry with problems of its own (already reported)
        return None
    client_id = client_id or f"{source.client_id}-alarms"
    if client_id == source.client_id:
        problems.error(reader.key("client_id"), f"{client_id!r} is the subscriber's client id of {broker!r}; the "
                                                "publisher needs its own (one session per client id)")
    return PublishConfig(broker=broker, client_id=client_id, **entry)


# ---------------------------------------------------------------------------- [shifts]
def _read_shifts(root: TableReader, problems: Problems) -> ShiftsConfig | None:
    reader = root.table("shifts", None)
    if reader is None or not reader.ok:
        return None
    zone = reader.get("timezone", zone_name, "UTC")
    shifts = []
    for key, value in reader.node.items():
        if key == "timezone":
            continue
        path = reader.key(key)
        if key in RESERVED_SHIFT_NAMES or not _SHIFT_NAME.match(key):
            problems.error(path, "a shift name must be letters, digits, '_' or '-' starting with a letter, and not "
                                 f"{choices_text(RESERVED_SHIFT_NAMES[:2])}")
            continue
        parsed = _shift_times(value)
        if parsed is None:
            hint = "did you mean the key \"timezone\"?" if did_you_mean(key, ["timezone"]) else ""
            problems.bad_value(path, value, 'a shift as "HH:MM-HH:MM" in local time, such as "06:00-18:00"', hint)
            continue
        shifts.append(Shift(key, *parsed))
    return ShiftsConfig(zone, tuple(shifts))


def _shift_times(value: Any) -> tuple[time, time] | None:
    if not isinstance(value, str):
        return None
    match = _SHIFT_TIMES.match(value)
    if match is None:
        return None
    h1, m1, h2, m2 = (int(g) for g in match.groups())
    if h2 == 24 and m2 == 0:
        h2 = 0
    if not (h1 < 24 and h2 < 24 and m1 < 60 and m2 < 60):
        return None
    return time(h1, m1), time(h2, m2)


__all__ = [
    "Config",
    "CsvSourceConfig",
    "FeedOverride",
    "MqttSourceConfig",
    "PublishConfig",
    "RefitConfig",
    "Shift",
    "ShiftsConfig",
    "StoreConfig",
    "TopicConfig",
    "available_cores",
    "config_from_text",
    "load_config",
]
