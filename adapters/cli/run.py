"""``leadline run --config FILE``: run the service until SIGTERM or SIGINT.

The parts are built by :func:`~leadline.adapters.service.wiring.build_service`
and run by :func:`~leadline.adapters.service.wiring.run_service`.
"""

from __future__ import annotations

import logging

from leadline.detector.events import CAUTION

from ..config.file import load_config
from ..service.loop import log_fields
from ..service.wiring import build_service, configure_logging, run_service

logger = logging.getLogger("leadline.run")


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("run", help="run the service: follow the sources, score, store the events",
                              description="Run the service from a config file until SIGTERM or SIGINT. " + CAUTION)
    p.add_argument("--config", required=True, help="the TOML config file")
    p.add_argument("--from-start", action="store_true",
                   help="read CSV files without a committed offset from their first byte (backfill history)")
    p.add_argument("--replay", action="store_true",
                   help="run on reading time, not the wall clock: for a replay of history")
    p.set_defaults(handler=_handle)


def _handle(args) -> int:
    configure_logging()
    config = load_config(args.config)
    for warning in config.warnings:
        logger.warning(log_fields("config", warning=warning))
    service = build_service(config, from_start=args.from_start, replay=args.replay)
    logger.info(log_fields("leadline run", config=str(config.path), store=config.store.safe_url,
                           sources=len(config.sources), caution=CAUTION))
    return run_service(service)
