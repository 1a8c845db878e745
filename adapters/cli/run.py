"""``leadline run --config FILE``: run the service until SIGTERM or SIGINT.

The parts are built by :func:`~leadline.adapters.service.wiring.build_service`
and run by :func:`~leadline.adapters.service.wiring.run_service`. The exit
status follows ``sysexits.h`` (:mod:`leadline.adapters.cli.exit_codes`): 0 after
SIGTERM, 78 for a bad config, 75 for a store or broker that is down at
start, 64 for bad command-line use. Logging: :mod:`leadline.adapters.service.log_setup`
(``--log-level``, ``--log-format``, journald priorities); systemd readiness
and watchdog: :mod:`leadline.adapters.service.sd_notify`.
"""

from __future__ import annotations

import argparse
import logging
import sys

from leadline.detector.errors import ConfigError, LeadlineError, SourceError
from leadline.detector.events import CAUTION

from ..config.file import load_config
from .exit_codes import EX_CONFIG, EX_SOFTWARE, EX_TEMPFAIL, exit_code_for
from ..sinks.file_modes import restrict_umask
from ..service.log_setup import FORMATS as LOG_FORMATS
from ..service.log_setup import LEVELS as LOG_LEVELS
from ..service.log_setup import configure_logging
from ..service.sd_notify import Notifier
from ..service.loop import Service, log_fields
from .progress import Progress
from .words import plural
from ..service.wiring import build_service, run_service
from ..service.startup import plaintext_credential_warnings, wait_for_brokers

logger = logging.getLogger("leadline.run")


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
    p.add_argument("--summary-interval", type=_positive_seconds, default=60.0, metavar="SECONDS",
                   help="how often the summary and store time lines are logged (60)")
    p.set_defaults(handler=_handle)


def _handle(args) -> int:
    """Run; the exit status follows sysexits.h (see :mod:`.exit_codes`)."""
    configure_logging(args.log_level, args.log_format, sys.stderr)
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
    service.summary_interval_s = args.summary_interval
    if args.replay:
        shown = Progress(sys.stdout, "replaying", unit="readings")
        service.progress = lambda svc: shown.update(
            svc.readings_total, f"{plural(svc.events_total, 'event')}, reading time {svc.clock():%Y-%m-%d %H:%M} UTC")
    try:
        return run_service(service)
    except LeadlineError as exc:
        status = exit_code_for(exc)
        logger.error(log_fields("stopped on an error", error=str(exc), exit_status=status))
        return status
    except Exception:  # noqa: BLE001 - a bug: logged with its traceback, and a status systemd restarts on
        logger.exception("internal error; exit status %d", EX_SOFTWARE)
        return EX_SOFTWARE


def _positive_seconds(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = float("nan")
    if not (value > 0 and value < float("inf")):
        raise argparse.ArgumentTypeError(f"expected a positive number of seconds, got {text!r}")
    return value


def _close_quietly(service: Service) -> None:
    for source in service.sources:
        close = getattr(source, "close", None)
        if close is not None:
            close()
    if service.publisher is not None:
        service.publisher.close()
    service.store.close()
