"""What the review commands share: finding the store, reading times, the clock.

The review commands (``events``, ``export``, ``ack``, ``shelve``, ``note``,
``status``) take ``--config FILE`` (the service's config: the store URL and
the ``[shifts]`` table) or ``--db URL``. Without either they use the file
named by the ``LEADLINE_CONFIG`` environment variable, else
``/etc/leadline/leadline.toml`` when it exists.

They never create a store: an SQLite file that does not exist is an error
(a mistyped path would otherwise leave an empty database behind).

Times typed on the command line (``--since``, ``--until``) are ISO 8601
(``2026-03-14T18:00Z``, ``2026-03-14T18:00+01:00``), a time or date without
an offset (read in the ``[shifts]`` time zone, else UTC), ``now``, or a
span back from now (``12h``, ``7d``). Tables show times in the same zone;
CSV and JSON always in UTC.

The clock is :func:`utc_now`, looked up at each call, so tests can fix it.
"""

from __future__ import annotations

import contextlib
import os
from dataclasses import dataclass
from datetime import date, datetime, timedelta, timezone, tzinfo
from pathlib import Path
from typing import Iterator, TextIO
from zoneinfo import ZoneInfo

from leadline.detector.durations import parse_duration_s
from leadline.detector.errors import ConfigError, DataError, SpecError, StoreError
from leadline.detector.events import CAUTION

from ..config.file import Config, load_config
from ..config.shifts import ShiftWindow, shift_window
from ..store.connect import resolve_url
from ..store.eventstore import EventStore, open_store
from ..store.reads import EventQueries

UTC = timezone.utc
DEFAULT_CONFIG = "/etc/leadline/leadline.toml"
CONFIG_ENV = "LEADLINE_CONFIG"


def utc_now() -> datetime:
    """The current time (UTC); replaced in tests."""
    return datetime.now(UTC)


def add_store_options(parser) -> None:
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--config", metavar="FILE",
                       help=f"the service's config file: store URL and [shifts] (default: ${CONFIG_ENV}, "
                            f"else {DEFAULT_CONFIG} if it exists)")
    group.add_argument("--db", metavar="URL",
                       help="the event store: an SQLite file or postgresql+psycopg://user@host/db")


@dataclass
class Review:
    """An open store (its review side) and what the config says about reading it."""

    store: EventQueries
    config: Config | None
    zone: tzinfo
    zone_name: str


def _config_path(args) -> str | None:
    if getattr(args, "config", None):
        return args.config
    if getattr(args, "db", None):
        return None
    if os.environ.get(CONFIG_ENV):
        return os.environ[CONFIG_ENV]
    if Path(DEFAULT_CONFIG).exists():
        return DEFAULT_CONFIG
    raise ConfigError(f"give --config FILE (the service's config) or --db URL (the event store); "
                      f"${CONFIG_ENV} is not set and {DEFAULT_CONFIG} does not exist")


def open_existing_store(url: str, flush_interval_s: float = 1.0, max_staged_events: int = 500) -> EventStore:
    """Open a store that must already exist (SQLite: the file)."""
    parsed = resolve_url(url)
    if parsed.get_backend_name() == "sqlite" and not Path(parsed.database).exists():
        raise StoreError(f"no event store at {parsed.database}: the file does not exist "
                         "(the service creates it when it first runs)")
    return open_store(url, flush_interval_s=flush_interval_s, max_staged_events=max_staged_events)


@contextlib.contextmanager
def open_review(args) -> Iterator[Review]:
    """The store named by ``--config``/``--db``, closed afterwards."""
    path = _config_path(args)
    config = load_config(path) if path else None
    url = config.store.url if config else args.db
    store = open_existing_store(url)
    zone: tzinfo = UTC
    zone_name = "UTC"
    if config is not None and config.shifts is not None:
        zone, zone_name = ZoneInfo(config.shifts.timezone), config.shifts.timezone
    try:
        yield Review(store, config, zone, zone_name)
    finally:
        store.close()


# ----------------------------------------------------------------------------- times
TIME_EXPECTED = ("an ISO 8601 time such as 2026-03-14T18:00Z or 2026-03-14T18:00+01:00, a local time or date "
                 "such as 2026-03-14T18:00 or 2026-03-14, 'now', or a span back from now such as 12h or 7d")


def parse_time(text: str, option: str, now: datetime, zone: tzinfo) -> datetime:
    """A time typed on the command line, as UTC (see the module docstring)."""
    value = text.strip()
    if value.lower() == "now":
        return now
    try:
        return now - timedelta(seconds=parse_duration_s(value))
    except SpecError:
        pass
    try:
        parsed = datetime.fromisoformat(value)
    except ValueError:
        try:
            day = date.fromisoformat(value)
        except ValueError as exc:
            raise DataError(f"{option} {text!r}: expected {TIME_EXPECTED}") from exc
        parsed = datetime(day.year, day.month, day.day)
    if parsed.tzinfo is None:
        parsed = parsed.replace(tzinfo=zone)
    return parsed.astimezone(UTC)


def show_time(moment: datetime | None, zone: tzinfo) -> str:
    """``2026-03-14 18:05 GMT`` for tables."""
    if moment is None:
        return ""
    local = moment.astimezone(zone)
    return f"{local:%Y-%m-%d %H:%M} {local.tzname() or ''}".rstrip()


def iso(moment: datetime | None) -> str | None:
    """UTC ISO 8601 for CSV and JSON."""
    return None if moment is None else moment.astimezone(UTC).isoformat()


def show_age(seconds: float) -> str:
    """An age in words (:func:`leadline.detector.durations.human_duration`, the package's one formatter)."""
    from leadline.detector.durations import human_duration

    return human_duration(seconds)


# ----------------------------------------------------------------------------- windows
@dataclass(frozen=True)
class Window:
    """A time window for a listing: ``since <= event.start < until``."""

    since: datetime | None
    until: datetime | None
    shift: ShiftWindow | None = None

    def describe(self, zone: tzinfo) -> str:
        """``Events of the night shift of 2026-03-13 (...)`` or ``Events that started ... to now``."""
        if self.shift is not None:
            w = self.shift
            return (f"Events of the {w.name} shift of {w.local_date.isoformat()} ({w.timezone}): started "
                    f"{show_time(self.since, zone)} to {show_time(self.until, zone)}")
        since = show_time(self.since, zone) if self.since else "the first event"
        until = show_time(self.until, zone) if self.until else "now"
        return f"Events that started {since} to {until}"


def add_window_options(parser, default_since: str | None) -> None:
    default = f" (default: {default_since} before now)" if default_since else ""
    parser.add_argument("--since", metavar="TIME", help="events that started at or after TIME" + default)
    parser.add_argument("--until", metavar="TIME", help="events that started before TIME (default: no end)")
    parser.add_argument("--shift", metavar="WHICH",
                        help="events of one shift from the config's [shifts]: last, current, NAME (its latest) "
                             "or DATE/NAME such as 2026-03-14/night")


def resolve_window(args, review: Review, now: datetime, default_since: str | None) -> Window:
    if args.shift:
        if args.since or args.until:
            raise DataError("--shift cannot be combined with --since or --until")
        window = shift_window(review.config.shifts if review.config else None, args.shift, now)
        return Window(window.start, window.end, window)
    since_text = args.since or default_since
    since = parse_time(since_text, "--since", now, review.zone) if since_text else None
    until = parse_time(args.until, "--until", now, review.zone) if args.until else None
    if since is not None and until is not None and until <= since:
        raise DataError(f"--until {args.until!r} is not after --since {since_text!r}")
    return Window(since, until)


def print_caution(out: TextIO, prefix: str = "") -> None:
    """The closing line of every listing."""
    print(f"{prefix}{CAUTION}", file=out)


__all__ = [
    "Review",
    "Window",
    "add_store_options",
    "add_window_options",
    "iso",
    "open_existing_store",
    "open_review",
    "parse_time",
    "print_caution",
    "resolve_window",
    "show_age",
    "show_time",
    "utc_now",
]
