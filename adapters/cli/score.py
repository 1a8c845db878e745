"""``leadline score``: fit on the start of a CSV, stream the rest, write the scores."""

from __future__ import annotations

import csv
import json
import math
import sys
from dataclasses import asdict
from datetime import date, datetime, timezone
from typing import TextIO

import numpy as np

from leadline.detector.durations import parse_duration_s
from leadline.detector.errors import DataError, SpecError
from leadline.detector.events import CAUTION, AlarmEvent
from leadline.detector.fitting import fit
from leadline.detector.grid import to_grid
from leadline.detector.rules.monitor import FeedMonitor, MonitorConfig
from leadline.detector.rules.thresholds import budget_thresholds, sigma_thresholds
from leadline.detector.seasonality import CalendarTerms, SeasonalPeriod
from leadline.detector.spec import ModelSpec

from ..sources.series_csv import read_series_csv

COLUMNS = ("timestamp", "value", "forecast", "error", "variance", "z", "lower", "upper")
WEEK_S = 7 * 86400.0


def train_slots(train: str, interval_s: float) -> int:
    """``--train``: a number of slots, or a span such as ``14d``."""
    text = str(train).strip()
    if text.isdigit():
        return int(text)
    try:
        return int(round(parse_duration_s(text) / interval_s))
    except SpecError as exc:
        raise DataError(f"--train {train!r}: expected a number of points or a span such as '14d' ({exc})") from exc


def build_spec(order: str, seasonal: str | None, trend: str | None) -> ModelSpec | str:
    if order.strip().lower() == "auto":
        if seasonal:
            raise SpecError("--seasonal cannot be combined with --order auto")
        return "auto"
    return ModelSpec.parse(order, seasonal, trend)


def build_calendar(args) -> CalendarTerms | None:
    """``--seasonality 1d:3,7d --weekend --holidays 2026-12-25,...`` -> calendar terms."""
    periods = tuple(SeasonalPeriod.parse(p) for p in args.seasonality.split(",")) if args.seasonality else ()
    holidays = ()
    if args.holidays:
        try:
            holidays = tuple(date.fromisoformat(d.strip()) for d in args.holidays.split(","))
        except ValueError as exc:
            raise SpecError(f"--holidays {args.holidays!r}: expected ISO dates such as 2026-12-25, comma-separated") \
                from exc
    if not periods and not args.weekend and not holidays:
        return None
    return CalendarTerms(periods, args.weekend, holidays, signed_duration_s(args.utc_offset or "0"))


def signed_duration_s(text: str) -> float:
    """``"+1h"``, ``"-5h"`` or ``"0"`` as seconds."""
    body = text.strip().lstrip("+-")
    sign = -1.0 if text.strip().startswith("-") else 1.0
    return 0.0 if body in ("", "0") else sign * parse_duration_s(body)


def _iso(epoch_s: float) -> str:
    return datetime.fromtimestamp(epoch_s, tz=timezone.utc).isoformat().replace("+00:00", "Z")


def _fmt(x: float) -> str:
    return "" if math.isnan(x) else repr(float(x))


def run_score(args, out: TextIO = sys.stdout, err: TextIO = sys.stderr) -> int:
    times, values = read_series_csv(args.input, args.series)
    grid = to_grid(times, values, interval_s=parse_duration_s(args.interval) if args.interval else None)
    n_train = train_slots(args.train, grid.interval_s)
    if n_train >= grid.values.size:
        raise DataError(f"--train {args.train} covers all {grid.values.size} slots; nothing is left to score")
    spec = build_spec(args.order, args.seasonal, args.trend)
    calendar = build_calendar(args)
    epoch = grid.epoch_s
    model = fit(grid.values[:n_train], spec, calendar=calendar,
                timestamps_epoch_s=epoch[:n_train] if calendar is not None else None)
    print(f"leadline score: fitted {model.spec.label} on {n_train} slots "
          f"(interval {grid.interval_s:g} s); AICc {model.aicc:.2f}, Ljung-Box p {model.ljung_box_pvalue:.3g}",
          file=err)
    if model.selection is not None:
        print(f"  chosen because: {model.selection.reason}", file=err)
    if model.calendar is not None:
        print(f"  calendar terms: {', '.join(model.calendar.names)}", file=err)
    for problem in model.problems:
        print(f"  fit problem: {problem}", file=err)
    counts = {k: v for k, v in grid.counts.as_dict().items() if v and k != "placed"}
    if counts:
        print(f"  grid: {counts}", file=err)
    stream = model.stream(level=args.level, model_version=1)
    monitor = build_monitor(args, model, grid.values[:n_train], grid.interval_s, stream)
    rules = list(monitor.lifecycles)
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(COLUMNS + tuple(f"state_{rule}" for rule in rules))
    events: dict[tuple, AlarmEvent] = {}
    for t in range(n_train, grid.values.size):
        when = datetime.fromtimestamp(epoch[t], tz=timezone.utc)
        for event in monitor.process(grid.values[t], when):
            events[event.key] = event  # the clearing copy replaces the onset copy
        inn = monitor.last_innovation
        writer.writerow([_iso(epoch[t]), _fmt(grid.values[t]), _fmt(inn.forecast), _fmt(inn.error),
                         _fmt(inn.variance), _fmt(inn.z), _fmt(inn.lower), _fmt(inn.upper)]
                        + [monitor.lifecycles[rule].state for rule in rules])
    print(f"  {len(events)} alarm events ({args.threshold_mode} limits); {CAUTION}", file=err)
    if args.events_out:
        write_events(args.events_out, list(events.values()))
    return 0


def build_monitor(args, model, train_values: np.ndarray, interval_s: float, stream) -> FeedMonitor:
    """The alarm rules, with limits in ``sigma`` mode or from a false-alarm budget."""
    if args.threshold_mode == "budget":
        thresholds = budget_thresholds(model.standardized_residuals, interval_s=interval_s,
                                       false_alarms=args.false_alarms_per_week, per_s=WEEK_S,
                                       values=train_values[np.isfinite(train_values)])
    else:
        thresholds = sigma_thresholds()
    config = MonitorConfig(thresholds=thresholds, range_low=args.range_low, range_high=args.range_high)
    return FeedMonitor(args.feed, stream, config)


def write_events(path: str, events: list[AlarmEvent]) -> None:
    """The events as a JSON document, each with its caution note."""
    rows = []
    for ev in sorted(events, key=lambda e: (e.start, e.rule)):
        row = asdict(ev)
        row["start"] = ev.start.isoformat()
        row["end"] = ev.end.isoformat() if ev.end else None
        rows.append({k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in row.items()})
    try:
        with open(path, "w", encoding="utf-8") as handle:
            json.dump({"caution": CAUTION, "events": rows}, handle, indent=2)
            handle.write("\n")
    except OSError as exc:
        raise DataError(f"--events-out {path}: cannot write: {exc.strerror}") from exc


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("score", help="fit a model on the start of a CSV and score the rest",
                              description="Fit on the first --train points of a CSV (timestamp,value), stream the "
                                          "rest one reading at a time, and write forecast, error, variance, z and "
                                          "the forecast interval for each reading.")
    p.add_argument("input", nargs="?", help="CSV with a header timestamp,value (or timestamp,series,value); "
                                            "default: the bundled example")
    p.add_argument("--series", help="which series to score when the CSV has a 'series' column")
    p.add_argument("--train", default="2000", help="points to fit on, or a span such as 14d (default 2000)")
    p.add_argument("--order", default="auto", help="p,d,q or auto (default auto)")
    p.add_argument("--seasonal", help="P,D,Q,s for a seasonal ARIMA with a short period (s <= 24)")
    p.add_argument("--trend", choices=["n", "c", "t", "ct"], help="trend (default: constant unless differenced)")
    p.add_argument("--interval", help="nominal interval such as 15min (default: median spacing)")
    p.add_argument("--seasonality", help="calendar cycles as Fourier terms, e.g. 1d:3,7d:2 (K after ':'; "
                                         "without it K is chosen by AICc)")
    p.add_argument("--weekend", action="store_true", help="add a weekend regressor")
    p.add_argument("--holidays", help="comma-separated ISO dates to flag as holidays")
    p.add_argument("--utc-offset", help="local time minus UTC for the calendar terms, e.g. 1h or -5h")
    p.add_argument("--level", type=float, default=0.95, help="forecast interval coverage (default 0.95)")
    p.add_argument("--out", help="write the scores here instead of standard output")
    p.add_argument("--events-out", help="write the alarm events here as JSON")
    p.add_argument("--feed", default="feed", help="feed id used in the events (default 'feed')")
    p.add_argument("--threshold-mode", choices=["sigma", "budget"], default="budget",
                   help="fixed sigma limits, or limits from a false-alarm budget (default)")
    p.add_argument("--false-alarms-per-week", type=float, default=1.0,
                   help="the tolerable false-alarm rate in budget mode (default 1)")
    p.add_argument("--range-low", type=float, help="lowest physically possible value (engineering range)")
    p.add_argument("--range-high", type=float, help="highest physically possible value")
    p.set_defaults(handler=_handle)


def _handle(args) -> int:
    if args.input is None:
        from ..examples import example_path

        args.input = str(example_path("booster-pressure.csv"))
    if not 0 < args.level < 1:
        raise DataError(f"--level must be between 0 and 1, got {args.level}")
    if args.out:
        try:
            with open(args.out, "w", newline="", encoding="utf-8") as handle:
                return run_score(args, handle)
        except OSError as exc:
            raise DataError(f"--out {args.out}: cannot write: {exc.strerror}") from exc
    return run_score(args)
