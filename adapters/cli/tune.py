"""``leadline tune --config FILE --setting NAME=V1,V2 ...``: replay the history under each combination.

For each combination of the ``--setting`` values
(:mod:`leadline.adapters.replay.tune_grid`) the config's history is replayed
(:mod:`leadline.adapters.replay`, feeds partitioned over ``--workers``
processes or a Dask ``--scheduler``), nothing is written to a store, and
one row is printed: alarms per feed-week, alarms per 8-hour shift for the
whole site, and with ``--labels`` (:mod:`leadline.adapters.replay.labels`)
recall, precision, false alarms and the median detection delay per fault kind
(:mod:`leadline.adapters.replay.scoring`). ``--csv`` writes the same rows.
"""

from __future__ import annotations

import csv
import math
import sys
from datetime import datetime, timezone
from pathlib import Path

from leadline.detector.durations import parse_duration_s
from leadline.detector.errors import ConfigError
from leadline.detector.events import CAUTION

from ..config.file import load_config
from ..replay.labels import read_labels
from ..replay.scoring import score_events
from ..replay.session import history_for, replay_settings, run_replay
from ..replay.summary import final_events
from ..replay.tune_grid import combinations, parse_settings
from .replay import parse_when

__all__ = ["add_parser", "tune_rows"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("tune", help="replay history under several settings: alarm load against recall",
                              description="Replay the config's history once per combination of settings and "
                                          "compare alarm load, and with labels recall and precision. " + CAUTION)
    p.add_argument("--config", required=True, help="the TOML config file")
    p.add_argument("--setting", action="append", default=[], metavar="NAME=V1,V2",
                   help="values to try (repeatable): false_alarms_per_week, rules, on_delay, off_delay, "
                        "stale_intervals")
    p.add_argument("--labels", metavar="CSV", help="known faults: feed,start,end,kind,note")
    p.add_argument("--grace", default="2h", metavar="DURATION",
                   help="how long after a fault's end an event still finds it (2h)")
    p.add_argument("--csv", dest="out_csv", metavar="PATH", help="write the table as CSV")
    p.add_argument("--history", action="append", default=[], metavar="PATH",
                   help="a CSV file, glob or folder to replay instead of the config's CSV sources (repeatable)")
    p.add_argument("--from", dest="start", metavar="TIME", help="first reading time kept (ISO 8601 with offset)")
    p.add_argument("--until", dest="end", metavar="TIME", help="readings before this time (ISO 8601 with offset)")
    p.add_argument("--workers", type=int, default=1, metavar="N", help="processes, feeds partitioned (1)")
    p.add_argument("--scheduler", metavar="tcp://HOST:PORT", help="a Dask scheduler to run the replays on")
    p.set_defaults(handler=_handle)


def tune_rows(config, history, settings_list, labels=None, *, grace_s: float = 7200.0, workers: int = 1,
              scheduler: str | None = None, progress=None) -> list[dict]:
    """One dict per setting: its label, the alarm load, and with labels the scores."""
    rows = []
    base = replay_settings(config, list(history.feeds))
    ends = [h.epoch_s.max() for h in history.feeds.values() if len(h)]
    history_end = datetime.fromtimestamp(float(max(ends)), tz=timezone.utc) if ends else None
    kinds = sorted({lb.kind for lb in labels}) if labels else []
    for i, setting in enumerate(settings_list, start=1):
        settings = {f: setting.apply(s) for f, s in base.items()}
        run = run_replay(history, settings, workers=workers, scheduler=scheduler)
        row = {"setting": setting.label, "alarms": run.summary.alarms, "events": run.summary.events,
               "alarms_per_feed_week": run.summary.alarms_per_feed_week,
               "alarms_per_shift": run.summary.alarms_per_shift}
        if labels is not None:
            score = score_events(final_events(run.events).values(), labels, grace_s=grace_s,
                                 history_end=history_end)
            row.update(recall=score.recall(), precision=score.precision, false_alarms=score.false_alarms)
            for kind in kinds:
                row[f"recall {kind}"] = score.recall(kind)
                row[f"median delay s {kind}"] = score.median_delay_s(kind)
        rows.append(row)
        if progress is not None:
            progress(i, len(settings_list), setting.label)
    return rows


def _cell(value) -> str:
    if isinstance(value, float):
        return "-" if math.isnan(value) else f"{value:.3g}"
    return str(value)


def _handle(args) -> int:
    config = load_config(args.config)
    parsed = parse_settings(args.setting)
    settings_list = combinations(parsed)
    if args.workers < 1:
        raise ConfigError(f"--workers: expected a whole number >= 1, got {args.workers}")
    labels = read_labels(args.labels) if args.labels else None
    start = parse_when(args.start, "--from") if args.start else None
    end = parse_when(args.end, "--until") if args.end else None
    history = history_for(config, args.history, start=start, end=end)

    def progress(i, n, label):
        print(f"tune: {i}/{n} {label}", file=sys.stderr, flush=True)

    rows = tune_rows(config, history, settings_list, labels, grace_s=parse_duration_s(args.grace),
                     workers=args.workers, scheduler=args.scheduler, progress=progress)
    columns = list(rows[0]) if rows else ["setting"]
    widths = {c: max(len(c), *(len(_cell(r.get(c, ""))) for r in rows)) for c in columns}
    print(f"tune of {config.path}: {history.readings} readings, {len(history.feeds)} feeds")
    print("  ".join(c.ljust(widths[c]) for c in columns))
    for row in rows:
        print("  ".join(_cell(row.get(c, "")).ljust(widths[c]) for c in columns))
    if args.out_csv:
        with Path(args.out_csv).open("w", newline="") as handle:
            writer = csv.DictWriter(handle, fieldnames=columns)
            writer.writeheader()
            for row in rows:
                writer.writerow({c: row.get(c, "") for c in columns})
    print(CAUTION)
    return 0
