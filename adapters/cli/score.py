"""``leadline score``: fit on the start of a CSV, stream the rest, write the scores."""

from __future__ import annotations

import csv
import math
import sys
from datetime import date
from typing import TextIO

import numpy as np

from leadline.detector.durations import parse_duration_s
from leadline.detector.errors import DataError, SpecError
from leadline.detector.events import CAUTION, AlarmEvent
from leadline.detector.feed_settings import FeedSettings
from leadline.detector.fitting import fit
from leadline.detector.grid import to_grid
from leadline.detector.refit import thresholds_from_config
from leadline.detector.rules.monitor import FeedMonitor, MonitorConfig
from leadline.detector.seasonality import CalendarTerms, SeasonalPeriod, zone_info
from leadline.detector.spec import ModelSpec

from .words import plural
from ..sources.series_csv import read_series_csv
from ..sources.timeparse import epoch_seconds_to_utc
from .formats import write_alarm_events_json

COLUMNS = ("timestamp", "value", "forecast", "error", "variance", "z", "lower", "upper")


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
    if args.timezone and args.utc_offset:
        raise SpecError("--timezone and --utc-offset do not go together; give the time zone")
    return CalendarTerms(periods, args.weekend, holidays, signed_duration_s(args.utc_offset or "0"),
                         args.timezone)


def signed_duration_s(text: str) -> float:
    """``"+1h"``, ``"-5h"`` or ``"0"`` as seconds."""
    body = text.strip().lstrip("+-")
    sign = -1.0 if text.strip().startswith("-") else 1.0
    return 0.0 if body in ("", "0") else sign * parse_duration_s(body)


def _iso(epoch_s: float) -> str:
    return epoch_seconds_to_utc(epoch_s).isoformat().replace("+00:00", "Z")


def _fmt(x: float) -> str:
    return "" if math.isnan(x) else repr(float(x))


def run_score(args, out: TextIO = sys.stdout, err: TextIO = sys.stderr) -> int:
    times, values = read_series_csv(args.input, args.series)
    grid = to_grid(times, values, interval_s=parse_duration_s(args.interval) if args.interval else None)
    n_train = train_slots(args.train, grid.interval_s)
    if n_train >= grid.values.size:
        raise DataError(f"--train {args.train} covers all {grid.values.size} slots; nothing is left to score")
    spec = build_spec(args.order, args.seasonal, args.trend)
    if args.timezone:
        zone_info(args.timezone)  # a clear error before any fitting
    calendar = build_calendar(args)
    epoch = grid.epoch_s
    model = fit(grid.values[:n_train], spec, calendar=calendar,
                timestamps_epoch_s=epoch[:n_train] if calendar is not None or spec == "auto" else None,
                interval_s=grid.interval_s, timezone=args.timezone)
    print(f"leadline score: fitted {model.description} on {n_train} slots "
          f"(interval {grid.interval_s:g} s); AICc {model.aicc:.2f}, Ljung-Box p {model.ljung_box_pvalue:.3g}",
          file=err)
    if model.selection is not None:
        print(f"  chosen because: {model.selection.reason}", file=err)
    if model.calendar is not None:
        print(f"  calendar terms: {', '.join(model.calendar.names)}", file=err)
    if model.treatment:
        print(f"  treatment: {model.treatment}", file=err)
    for problem in model.advice:
        print(f"  fit problem: {problem.text}", file=err)
        print(f"    remedy: {problem.remedy}", file=err)
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
        when = epoch_seconds_to_utc(epoch[t])
        for event in monitor.process(grid.values[t], when):
            events[event.key] = event  # the clearing copy replaces the onset copy
        inn = monitor.last_innovation
        writer.writerow([_iso(epoch[t]), _fmt(grid.values[t]), _fmt(inn.forecast), _fmt(inn.error),
                         _fmt(inn.variance), _fmt(inn.z), _fmt(inn.lower), _fmt(inn.upper)]
                        + [monitor.lifecycles[rule].state for rule in rules])
    print(f"  {plural(len(events), 'alarm event')} ({args.threshold_mode} limits); {CAUTION}", file=err)
    if args.events_out:
        write_events(args.events_out, list(events.values()))
    return 0


def build_monitor(args, model, train_values: np.ndarray, interval_s: float, stream) -> FeedMonitor:
    """The alarm rules, with limits in ``sigma`` mode or from a false-alarm budget.

    The limits come from the engine's own code
    (:func:`~leadline.detector.refit.thresholds_from_config`), as for a feed of
    the service with the same mode and budget.
    """
    thresholds = thresholds_from_config(model, train_values, interval_s,
                                        {"mode": args.threshold_mode,
                                         "false_alarms_per_week": float(args.false_alarms_per_week)})
    config = MonitorConfig(thresholds=thresholds, range_low=args.range_low, range_high=args.range_high)
    return FeedMonitor(args.feed, stream, config)


def write_events(path: str, events: list[AlarmEvent]) -> None:
    """The events as JSON in the form of ``leadline events`` (:mod:`.event_formats`), each with its caution."""
    try:
        with open(path, "w", encoding="utf-8") as handle:
            write_alarm_events_json(sorted(events, key=lambda e: (e.start, e.rule)), handle)
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
    p.add_argument("--train", default=str(FeedSettings.train_points),
                   help=f"points to fit on, or a span such as 14d (default {FeedSettings.train_points})")
    p.add_argument("--order", default="auto", help="p,d,q or auto (default auto)")
    p.add_argument("--seasonal", help="P,D,Q,s for a seasonal ARIMA with a short period (s <= 24)")
    p.add_argument("--trend", choices=["n", "c", "t", "ct"], help="trend (default: constant unless differenced)")
    p.add_argument("--interval", help="nominal interval such as 15min (default: median spacing)")
    p.add_argument("--seasonality", help="calendar cycles as Fourier terms, e.g. 1d:3,7d:2 (K after ':'; "
                                         "without it K is chosen by AICc)")
    p.add_argument("--weekend", action="store_true", help="add a weekend regressor")
    p.add_argument("--holidays", help="comma-separated ISO dates to flag as holidays")
    p.add_argument("--timezone", help="IANA time zone of the calendar terms and of the cycles 'auto' looks for, "
                                      "e.g. Europe/London (default UTC); the daily shape follows its clock")
    p.add_argument("--utc-offset", help="a fixed local time minus UTC instead of --timezone, e.g. 1h or -5h")
    p.add_argument("--level", type=float, default=FeedSettings.level,
                   help=f"forecast interval coverage (default {FeedSettings.level:g})")
    p.add_argument("--out", help="write the scores here instead of standard output")
    p.add_argument("--events-out", help="write the alarm events here as JSON")
    p.add_argument("--feed", default="feed", help="feed id used in the events (default 'feed')")
    p.add_argument("--threshold-mode", choices=["sigma", "budget"], default="budget",
                   help="fixed sigma limits, or limits from a false-alarm budget (default)")
    p.add_argument("--false-alarms-per-week", type=float, default=FeedSettings.false_alarms_per_week,
                   help="the tolerable false-alarm rate in budget mode "
                        f"(default {FeedSettings.false_alarms_per_week:g})")
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
