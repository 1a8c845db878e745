"""``leadline replay --config FILE``: what a config would have done over its history.

Reads the history of the config's CSV sources (or of the CSV files given
with ``--csv``) with the followers' parser, runs the real engine on reading
time with refits inline (deterministic), writes events and models to a
store of its own (``replay.db`` beside the config unless ``--store`` names
another), and prints a summary. ``--workers N`` runs groups of feeds in a
process pool; ``--scheduler tcp://host:port`` on a Dask cluster (the
``cluster`` extra). Progress goes to standard error: one updating line on a
terminal, plain lines otherwise.
"""

from __future__ import annotations

import sys
import time
from datetime import datetime, timezone

from leadline.detector.errors import ConfigError
from leadline.detector.events import CAUTION

from ..config.file import load_config
from ..replay.session import default_store_url, history_for, replay_settings, run_replay
from ..replay.writer import write_results

__all__ = ["add_parser", "Progress", "parse_when"]


def parse_when(text: str, option: str) -> datetime:
    """An ISO 8601 time with offset (``2026-03-01T00:00:00+00:00``) for ``option``."""
    try:
        when = datetime.fromisoformat(text)
    except ValueError as exc:
        raise ConfigError(f"{option}: expected an ISO 8601 time with offset, got {text!r}") from exc
    if when.tzinfo is None:
        raise ConfigError(f"{option}: {text!r} has no UTC offset; write it as 2026-03-01T00:00:00+00:00")
    return when.astimezone(timezone.utc)


class Progress:
    """Groups done and readings replayed, on standard error."""

    def __init__(self, total_feeds: int, total_readings: int, stream=None) -> None:
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.total_feeds, self.total_readings = total_feeds, total_readings
        self.feeds = self.readings = 0
        self.started = time.monotonic()

    def __call__(self, result) -> None:
        self.feeds += len(result.feeds)
        self.readings += result.readings
        self._line()

    def within(self, readings: int) -> None:
        """Readings replayed so far by the one group running in this process."""
        self._line(readings)

    def _line(self, running: int = 0) -> None:
        rate = (self.readings + running) / max(time.monotonic() - self.started, 1e-9)
        line = (f"replay: {self.feeds}/{self.total_feeds} feeds, "
                f"{self.readings + running}/{self.total_readings} readings, "
                f"{rate:.0f} readings/s")
        if self.tty:
            self.stream.write("\r" + line)
            if self.feeds >= self.total_feeds:
                self.stream.write("\n")
        else:
            self.stream.write(line + "\n")
        self.stream.flush()


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("replay", help="replay history through the engine: what a config would have done",
                              description="Replay CSV history through the engine on reading time, refits "
                                          "inline, into a store of its own; print a summary. " + CAUTION)
    p.add_argument("--config", required=True, help="the TOML config file")
    p.add_argument("--csv", action="append", default=[], metavar="PATH",
                   help="a CSV file, glob or folder to replay instead of the config's CSV sources (repeatable)")
    p.add_argument("--from", dest="start", metavar="TIME", help="first reading time kept (ISO 8601 with offset)")
    p.add_argument("--until", dest="end", metavar="TIME", help="readings before this time (ISO 8601 with offset)")
    p.add_argument("--store", metavar="URL", help="the store written (default: replay.db beside the config)")
    p.add_argument("--workers", type=int, default=1, metavar="N", help="processes, feeds partitioned (1)")
    p.add_argument("--scheduler", metavar="tcp://HOST:PORT", help="a Dask scheduler to run the groups on")
    p.set_defaults(handler=_handle)


def _handle(args) -> int:
    from ..store import open_store

    config = load_config(args.config)
    start = parse_when(args.start, "--from") if args.start else None
    end = parse_when(args.end, "--until") if args.end else None
    if args.workers < 1:
        raise ConfigError(f"--workers: expected a whole number >= 1, got {args.workers}")
    history = history_for(config, args.csv, start=start, end=end)
    settings = replay_settings(config, list(history.feeds))
    url = args.store or default_store_url(config)
    store = open_store(url)
    try:
        progress = Progress(len(history.feeds), history.readings)
        run = run_replay(history, settings, workers=args.workers, scheduler=args.scheduler, on_done=progress,
                         on_progress=progress.within)
        write_results(store, run.results)
    finally:
        store.close()
    print(f"replay of {config.path} into {url}")
    for line in run.summary.lines():
        print("  " + line)
    if history.rejected:
        print(f"  rows rejected {history.rejected}")
    print(CAUTION)
    return 0
