"""One replay from a config: read the history, run the groups, write the store, summarise.

Shared by ``leadline replay`` and ``leadline tune`` (which runs it once per
setting, without a store).
"""

from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Callable, Mapping, Sequence

from leadline.detector.engine import FeedSettings
from leadline.detector.events import AlarmEvent

from ..config.file import Config
from ..sources.csv_rows import CsvLayout
from .history import History, read_history
from .parallel import run_groups
from .runner import GroupResult
from .summary import ReplaySummary, summarise

__all__ = ["ReplayRun", "default_store_url", "history_for", "replay_settings", "run_replay"]


def default_store_url(config: Config) -> str:
    """``replay.db`` beside the config file: never the live store unless asked for."""
    return "sqlite:///" + str(Path(config.path).resolve().parent / "replay.db")


def history_for(config: Config, csv_paths: Sequence[str] = (), *, start: datetime | None = None,
                end: datetime | None = None) -> History:
    """The history of the config's CSV sources, or of ``csv_paths`` read with the first source's layout."""
    if csv_paths:
        layout = config.csv_sources[0].layout() if config.csv_sources else CsvLayout()
        sources = [(f"replay-{i + 1}", os.path.abspath(p), layout) for i, p in enumerate(csv_paths)]
    else:
        sources = [(c.name, c.path, c.layout()) for c in config.csv_sources]
    return read_history(sources, start=start, end=end)


def replay_settings(config: Config, feed_ids: Sequence[str],
                    adjust: Callable[[FeedSettings], FeedSettings] | None = None) -> dict[str, FeedSettings]:
    """Each feed's settings as ``leadline run --replay`` builds them (no future check), optionally adjusted."""
    from ..service.wiring import feed_settings

    out = {}
    for feed_id in feed_ids:
        settings = dataclasses.replace(feed_settings(config, feed_id), future_tolerance_s=None)
        out[feed_id] = adjust(settings) if adjust is not None else settings
    return out


@dataclass
class ReplayRun:
    results: list[GroupResult]
    summary: ReplaySummary

    @property
    def events(self) -> list[AlarmEvent]:
        return [e for r in self.results for e in r.events]


def run_replay(history: History, settings: Mapping[str, FeedSettings], *, workers: int = 1,
               scheduler: str | None = None, on_done: Callable[[GroupResult], None] | None = None,
               on_progress: Callable[[int], None] | None = None) -> ReplayRun:
    results = run_groups(history.feeds, settings, workers=workers, scheduler=scheduler, on_done=on_done,
                         on_progress=on_progress)
    return ReplayRun(results, summarise(history.feeds, (e for r in results for e in r.events)))


