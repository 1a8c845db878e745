"""Build the service from a config, and run it with SIGTERM and SIGINT wired.

The config (:mod:`leadline.adapters.config`) names the sources, the store,
the feeds' options, the refit policy and the alarm publisher. This module
turns it into the running parts: one
:class:`~leadline.adapters.sources.csv_follow.CsvFollower` per
``[[sources.csv]]`` (resuming from the offsets committed in the store),
one :class:`~leadline.adapters.sources.mqtt_subscriber.MqttSubscriber` per
``[[sources.mqtt]]``, the engine with each feed's
:class:`~leadline.detector.engine.FeedSettings` (its checkpoints restored,
so a restart resumes without a learning phase), the store, the publisher,
and the :class:`~.loop.Service` loop. SIGTERM and SIGINT stop it cleanly
(:func:`run_service`): sources stopped, queue drained, events and
checkpoints flushed, exit 0. ``leadline run`` is :mod:`leadline.adapters.cli.run`;
its other exit statuses follow ``sysexits.h`` (:mod:`leadline.adapters.cli.exit_codes`).
Files are created with mode 0600 (:mod:`leadline.adapters.sinks.file_modes`).
"""

from __future__ import annotations

import dataclasses
import logging
import signal
from typing import TYPE_CHECKING

from leadline.detector.engine import Engine, FeedSettings
from leadline.detector.errors import ConfigError, StateFormatError
from leadline.detector.rules.monitor import MonitorConfig
from leadline.detector.seasonality import CalendarTerms, SeasonalPeriod
from leadline.detector.spec import ModelSpec

from ..config.file import Config
from ..sinks.file_modes import create_private_file
from ..ports import Source
from .durability import Durability
from .loop import Service, log_fields

if TYPE_CHECKING:
    from ..store import EventStore

logger = logging.getLogger("leadline.run")


def feed_settings(config: Config, feed_id: str) -> FeedSettings:
    """The engine's settings of one feed, from its resolved config options."""
    options = config.feed_settings(feed_id)
    model = options["model"]
    if model == "auto":
        spec: ModelSpec | str = "auto"
    else:
        seasonal = model.get("seasonal")
        spec = ModelSpec(tuple(model["order"]), tuple(seasonal) if seasonal else None, model.get("trend"))
    calendar = None
    if options["seasonality"] or options["weekend"] or options["holidays"]:
        periods = tuple(SeasonalPeriod(p["period_s"], p["harmonics"]) for p in options["seasonality"])
        calendar = CalendarTerms(periods, options["weekend"], tuple(options["holidays"]), options["utc_offset_s"],
                                 options["timezone"])
    mode = options["threshold_mode"]
    limits = dict(options["limits"])
    train_points = int(options["train_points"])
    refit = config.refit
    return FeedSettings(
        spec=spec,
        calendar=calendar,
        interval_s=options["interval_s"],
        train_points=train_points,
        train_span_s=options["train_span_s"],
        min_train_points=min(200, train_points),
        refit_every_s=refit.every_s,
        refit_window_points=refit.window_points or train_points,
        diagnostics_refit=refit.on_degraded,
        threshold_mode=mode,
        false_alarms_per_week=options["false_alarms_per_week"],
        sigma_limits=limits if mode == "sigma" else None,
        budget_options=limits if mode == "budget" else None,
        monitor=MonitorConfig(range_low=options["range_low"], range_high=options["range_high"],
                              stale_intervals=options["stale_intervals"],
                              rules=tuple(options["rules"]) if options["rules"] else None),
        counter=options["counter"],
        register_size=options["register_size"],
        timezone=options["timezone"],
        incident_gap_slots=int(options["incident_gap_slots"]),
    )


def open_configured_store(config: Config) -> EventStore:
    """The store of ``[store]``, with its flush interval and batch size."""
    from ..store import open_store

    return open_store(config.store.url, flush_interval_s=config.store.flush_interval_s,
                      max_staged_events=config.store.flush_events)


def build_service(config: Config, *, from_start: bool = False, refit_workers: int | None = None,
                  replay: bool = False, store: EventStore | None = None) -> Service:
    """Every running part of the service, wired; nothing is started yet.

    ``replay=True`` runs on reading time instead of the wall clock: the
    engine's ticks follow the newest reading, and readings are not checked
    against the wall clock (for backfills of history and the demo).
    ``store``: an open store to use (the demo reads its events afterwards);
    default :func:`open_configured_store`. Either way the service's
    shutdown (:func:`run_service`) or the caller closes it.
    """
    from ..sources.csv_follow import CsvFollower
    from ..sources.mqtt_subscriber import MqttSubscriber

    if store is None:
        sqlite_path = config.store.sqlite_path
        if sqlite_path is not None and sqlite_path.parent.is_dir():
            create_private_file(sqlite_path)  # mode 0600; SQLite gives -wal and -shm the same mode
        store = open_configured_store(config)
    cache: dict[str, FeedSettings] = {}

    def settings_for(feed_id: str) -> FeedSettings:
        if feed_id not in cache:
            settings = feed_settings(config, feed_id)
            cache[feed_id] = dataclasses.replace(settings, future_tolerance_s=None) if replay else settings
        return cache[feed_id]

    engine = Engine(settings_for)
    durability = None
    if config.store.journal:
        # Snapshots and the journal after them are restored when the service starts (:mod:`.durability`).
        durability = Durability(store, snapshot_interval_s=config.store.snapshot_interval_s,
                                snapshot_every_readings=config.store.snapshot_readings,
                                snapshot_max_feeds=config.store.snapshot_max_feeds)
    for feed_id, (state, version) in ({} if durability else store.load_checkpoints()).items():
        try:
            engine.restore(feed_id, state, version)
        except (StateFormatError, ConfigError) as exc:
            logger.warning(log_fields("checkpoint not used; the feed learns again", feed=feed_id, error=str(exc)))
        else:
            logger.info(log_fields("checkpoint restored", feed=feed_id, model_version=version))
    sources: list[Source] = []
    for csv_source in config.csv_sources:
        sources.append(CsvFollower(csv_source.name, csv_source.path, csv_source.layout(),
                                   start_offsets=store.load_offsets(csv_source.name),
                                   from_start=from_start or csv_source.from_start,
                                   max_feeds=csv_source.max_feeds))
    for mqtt_source in config.mqtt_sources:
        sources.append(MqttSubscriber(mqtt_source.name, mqtt_source.settings(), mqtt_source.subscriptions(),
                                      queue_max_messages=mqtt_source.queue_size,
                                      max_topic_bytes=mqtt_source.max_topic_bytes, max_feeds=mqtt_source.max_feeds))
    publisher = None
    if config.publish is not None:
        from ..sinks.alarm_publisher import MqttAlarmPublisher

        publisher = MqttAlarmPublisher(config.publisher_settings(), config.publish.topic_template,
                                       config.publish.status_topic_template, config.publish.max_queued_messages,
                                       metadata=feed_metadata_of(config))
        publisher.start()
    workers = config.refit.workers if refit_workers is None else refit_workers
    return Service(engine=engine, store=store, sources=sources, publisher=publisher, refit_workers=workers,
                   clock="readings" if replay else _wall_clock, store_retry_base_s=config.store.retry_base_s,
                   store_retry_cap_s=config.store.retry_cap_s, durability=durability,
                   refit_install_delay_slots=config.refit.install_delay_slots,
                   metadata=feed_metadata_of(config))


def feed_metadata_of(config: Config):
    """``metadata(feed_id)``: the feed's configured description, unit, site, tag and time zone (cached)."""
    from ..config.feeds import METADATA_KEYS

    cache: dict[str, dict] = {}

    def metadata(feed_id: str) -> dict:
        if feed_id not in cache:
            options = config.feed_settings(feed_id)
            cache[feed_id] = {k: options.get(k) for k in METADATA_KEYS}
        return cache[feed_id]

    return metadata


def _wall_clock():
    from datetime import datetime, timezone

    return datetime.now(timezone.utc)


def run_service(service: Service) -> int:
    """Run with SIGTERM and SIGINT wired to a clean stop; return the exit code."""

    def stop(signum, frame):  # noqa: ARG001 - signal handler signature
        logger.info(log_fields("stop requested", signal=signal.Signals(signum).name))
        service.request_stop()

    previous = {sig: signal.signal(sig, stop) for sig in (signal.SIGTERM, signal.SIGINT)}
    try:
        return service.run()
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        if service.publisher is not None:
            service.publisher.close()
        service.store.close()
