"""``leadline run --config FILE``: build the service from a config and run it.

The config (:mod:`.config`) names the sources, the store, the feeds'
options, the refit policy and the alarm publisher. This module turns it
into the running parts: one :class:`~.sources.csv_follow.CsvFollower` per
``[[sources.csv]]`` (resuming from the offsets committed in the store),
one :class:`~.sources.mqtt_subscriber.MqttSubscriber` per
``[[sources.mqtt]]``, the engine with each feed's
:class:`~leadline.detector.engine.FeedSettings` (its checkpoints restored,
so a restart resumes without a learning phase), the store, the publisher,
and the :class:`~.service.Service` loop. SIGTERM and SIGINT stop it
cleanly: sources stopped, queue drained, events and checkpoints flushed,
exit 0. Other exit statuses follow ``sysexits.h`` (:mod:`.exit_codes`): 78
for a bad config, 75 for a store or broker that is down at start, 64 for
bad command-line use. Logging: :mod:`.log_setup` (``--log-level``,
``--log-format``, journald priorities); systemd readiness and watchdog:
:mod:`.sd_notify`; files are created with mode 0600 (:mod:`.file_modes`).
"""

from __future__ import annotations

import dataclasses
import logging
import signal
import sys
from typing import Any

from leadline.detector.engine import Engine, FeedSettings
from leadline.detector.errors import ConfigError, LeadlineError, SourceError, StateFormatError
from leadline.detector.events import CAUTION
from leadline.detector.rules.monitor import MonitorConfig
from leadline.detector.seasonality import CalendarTerms, SeasonalPeriod
from leadline.detector.spec import ModelSpec

from .config import Config, load_config
from .exit_codes import EX_CONFIG, EX_SOFTWARE, EX_TEMPFAIL, exit_code_for
from .file_modes import create_private_file, restrict_umask
from .log_setup import FORMATS as LOG_FORMATS
from .log_setup import LEVELS as LOG_LEVELS
from .log_setup import configure_logging as setup_logging
from .sd_notify import Notifier
from .service import Service, log_fields
from .startup import plaintext_credential_warnings, wait_for_brokers

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
        calendar = CalendarTerms(periods, options["weekend"], tuple(options["holidays"]), options["utc_offset_s"])
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
                              stale_missing_intervals=options["stale_intervals"],
                              rules=tuple(options["rules"]) if options["rules"] else None),
        counter=options["counter"],
        register_size=options["register_size"],
    )


class _Publisher:
    """Adapts :class:`~.sources.alarm_publisher.AlarmPublisher` to ``publish(events)``."""

    def __init__(self, publisher: Any) -> None:
        self.publisher = publisher

    def publish(self, events) -> None:
        for event in events:
            self.publisher.publish(event)


def build_service(config: Config, *, from_start: bool = False, refit_workers: int | None = None,
                  replay: bool = False) -> Service:
    """Every running part of the service, wired; nothing is started yet.

    ``replay=True`` runs on reading time instead of the wall clock: the
    engine's ticks follow the newest reading, and readings are not checked
    against the wall clock (for backfills of history and the demo).
    """
    from .sources.csv_follow import CsvFollower
    from .sources.mqtt_subscriber import MqttSubscriber
    from .store import open_store

    sqlite_path = config.store.sqlite_path
    if sqlite_path is not None and sqlite_path.parent.is_dir():
        create_private_file(sqlite_path)  # mode 0600; SQLite gives -wal and -shm the same mode
    store = open_store(config.store.url, flush_interval_s=config.store.flush_interval_s,
                       max_staged_events=config.store.flush_events)
    cache: dict[str, FeedSettings] = {}

    def settings_for(feed_id: str) -> FeedSettings:
        if feed_id not in cache:
            settings = feed_settings(config, feed_id)
            cache[feed_id] = dataclasses.replace(settings, future_tolerance_s=None) if replay else settings
        return cache[feed_id]

    engine = Engine(settings_for)
    for feed_id, (state, version) in store.load_checkpoints().items():
        try:
            engine.restore(feed_id, state, version)
        except (StateFormatError, ConfigError) as exc:
            logger.warning(log_fields("checkpoint not used; the feed learns again", feed=feed_id, error=str(exc)))
        else:
            logger.info(log_fields("checkpoint restored", feed=feed_id, model_version=version))
    sources: list[Any] = []
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
        from .sources.alarm_publisher import AlarmPublisher

        inner = AlarmPublisher(config.publisher_settings(), config.publish.topic_template,
                               config.publish.status_topic_template, config.publish.max_queued_messages)
        inner.start()
        publisher = _Publisher(inner)
    workers = config.refit.workers if refit_workers is None else refit_workers
    return Service(engine=engine, store=store, sources=sources, publisher=publisher, refit_workers=workers,
                   clock="readings" if replay else _wall_clock, store_retry_base_s=config.store.retry_base_s,
                   store_retry_cap_s=config.store.retry_cap_s)


def _wall_clock():
    from datetime import datetime, timezone

    return datetime.now(timezone.utc)


def configure_logging(level: str = "info", fmt: str = "text") -> None:
    """Logging of the service to standard error (see :mod:`.log_setup`)."""
    setup_logging(level, fmt, sys.stderr)


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
            service.publisher.publisher.close()
        service.store.close()


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("run", help="run the service: follow the sources, score, store the events",
                              description="Run the service from a config file until SIGTERM or SIGINT. " + CAUTION)
    p.add_argument("--config", required=True, help="the TOML config file")
    p.add_argument("--from-start", action="store_true",
                   help="read CSV files without a committed offset from their first byte (backfill history)")
    p.add_argument("--replay", action="store_true",
                   help="run on reading time, not the wall clock: for a replay of history")
    p.add_argument("--log-level", choices=LOG_LEVELS, default="info", help="least severe level logged (info)")
    p.add_argument("--log-format", choices=LOG_FORMATS, default="text",
                   help="text lines (default) or one JSON object per line")
    p.add_argument("--startup-timeout", type=float, default=30.0, metavar="SECONDS",
                   help="how long to wait for the store and brokers at start before exiting with 75 (30)")
    p.set_defaults(handler=_handle)


def _handle(args) -> int:
    """Run; the exit status follows sysexits.h (see :mod:`.exit_codes`)."""
    configure_logging(args.log_level, args.log_format)
    restrict_umask()  # the store, its WAL files and anything else created: mode 0600
    try:
        config = load_config(args.config)
    except ConfigError as exc:
        logger.error(log_fields("config refused; not starting", error=str(exc), exit_status=EX_CONFIG))
        return EX_CONFIG
    for warning in config.warnings:
        logger.warning(log_fields("config", warning=warning))
    for warning in plaintext_credential_warnings(config):
        logger.warning(log_fields("credentials without TLS", warning=warning))
    try:
        service = build_service(config, from_start=args.from_start, replay=args.replay)
    except LeadlineError as exc:
        status = exit_code_for(exc)
        logger.error(log_fields("cannot start", error=str(exc), exit_status=status))
        return status
    logger.info(log_fields("leadline run", config=str(config.path), store=config.store.safe_url,
                           sources=len(config.sources), caution=CAUTION))
    try:
        wait_for_brokers(service.sources, args.startup_timeout)
    except SourceError as exc:
        logger.error(log_fields("broker not reachable at start; exiting for a later restart", error=str(exc),
                                exit_status=EX_TEMPFAIL))
        _close_quietly(service)
        return EX_TEMPFAIL
    service.notifier = Notifier()
    try:
        return run_service(service)
    except LeadlineError as exc:
        status = exit_code_for(exc)
        logger.error(log_fields("stopped on an error", error=str(exc), exit_status=status))
        return status
    except Exception:  # noqa: BLE001 - a bug: logged with its traceback, and a status systemd restarts on
        logger.exception("internal error; exit status %d", EX_SOFTWARE)
        return EX_SOFTWARE


def _close_quietly(service: Service) -> None:
    for source in service.sources:
        close = getattr(source, "close", None)
        if close is not None:
            close()
    if service.publisher is not None:
        service.publisher.publisher.close()
    service.store.close()
