"""``leadline summary``: a shift's alarm figures as plain text, beside the reference rates.

The window is ``--shift`` (``last``, ``current``, ``NAME``, ``DATE/NAME``) or
``--since``/``--until``; without any of them, the last shift when the config
has a ``[shifts]`` table, else the last 12 hours. The figures and their
definitions are those of :mod:`.shift_figures`, as in ``leadline report``.
"""

from __future__ import annotations

import sys
from datetime import datetime
from typing import TextIO

from . import review
from .formats import write_aligned
from .review import Review, Window, add_store_options, add_window_options, open_review, print_caution, show_time
from .shelving import add_include_option
from ..report.figures import ShiftData, human_duration, load_figures, plural, reference_rows

DEFAULT_SINCE = "12h"


def resolve_report_window(args, rv: Review, now: datetime) -> Window:
    """The window of ``report`` and ``summary`` (module docstring); an open end is ``now``."""
    if not (args.shift or args.since or args.until):
        if rv.config is not None and rv.config.shifts is not None and rv.config.shifts.shifts:
            args.shift = "last"
    window = review.resolve_window(args, rv, now, DEFAULT_SINCE)
    return Window(window.since, window.until or now, window.shift)


def window_title(window: Window, rv: Review) -> str:
    """``night shift of 2026-10-20 (Europe/London)`` or ``2026-10-20 06:00 BST to ...``."""
    span = f"{show_time(window.since, rv.zone)} to {show_time(window.until, rv.zone)}"
    length = human_duration((window.until - window.since).total_seconds())
    if window.shift is not None:
        return f"{window.shift.name} shift of {window.shift.local_date.isoformat()} ({rv.zone_name}), {span} ({length})"
    return f"{span} ({length})"


def write_summary(data: ShiftData, window: Window, rv: Review, out: TextIO) -> None:
    fig = data.figures
    zone = rv.zone
    print(f"Summary of the {window_title(window, rv)}", file=out)
    print(f"Store {data.store_url}; times in {rv.zone_name}.", file=out)
    if data.shelved_hidden:
        print(f"{plural(data.shelved_hidden, 'alarm')} of shelved feeds left out (--include-shelved counts them).",
              file=out)
    print("", file=out)
    sev = fig.by_severity
    parts = [f"{sev[s]} {s}" for s in ("alarm", "warning") if sev.get(s)]
    line = f"{plural(fig.alarms, 'alarm')} started" + (f" (severity: {', '.join(parts)})" if parts else "")
    print(f"{line}, in {plural(len(data.incidents), 'incident')} on "
          f"{plural(len({i.feed_id for i in data.incidents}), 'feed')}.", file=out)
    print("", file=out)
    rows = [[r.figure, r.value, r.reference, "" if r.within is None else ("within" if r.within else "ABOVE")]
            for r in reference_rows(fig)]
    value_heading = "THIS SHIFT" if window.shift is not None else "THIS WINDOW"
    write_aligned(("FIGURE", value_heading, "REFERENCE (COMMON PRACTICE)", ""), rows, out)
    if fig.floods:
        print("", file=out)
        print("Floods:", file=out)
        for f in fig.floods:
            print(f"  {show_time(f.start, zone)} to {show_time(f.end, zone)}: {plural(f.alarms, 'alarm')} in "
                  f"{human_duration((f.end - f.start).total_seconds())}", file=out)
    if fig.top_feeds:
        print("", file=out)
        print("Feeds with most alarms:", file=out)
        write_aligned(("FEED", "ALARMS", "SHARE"),
                      [[f.feed_id, str(f.alarms), f"{100 * f.share:.0f} %"] for f in fig.top_feeds], out,
                      right={"ALARMS", "SHARE"})
    _list(out, "Repeating alarms", [f"{r.feed_id} {r.rule}: {plural(r.episodes, 'episode')}" for r in fig.repeating])
    _list(out, "Standing alarms", [
        f"#{s.id} {s.event.feed_id} {s.event.rule} since {show_time(s.event.start, zone)} "
        f"({human_duration((fig.until - s.event.start).total_seconds())} at the end of the window)"
        for s in fig.standing])
    _list(out, "Unacknowledged alarms", [
        f"#{s.id} {s.event.feed_id} {s.event.rule} {s.event.severity} at {show_time(s.event.start, zone)}"
        for s in fig.unacked])
    _list(out, "Shelved feeds", [
        f"{n.feed_id} until {show_time(n.expires_at, zone)} by {n.operator}: {n.text}" for n in fig.shelved])
    _list(out, "Stale feeds", list(fig.stale_feeds))
    print("", file=out)
    print_caution(out)


def _list(out: TextIO, title: str, lines: list[str]) -> None:
    print("", file=out)
    if not lines:
        print(f"{title}: none.", file=out)
        return
    print(f"{title} ({len(lines)}):", file=out)
    for line in lines:
        print(f"  {line}", file=out)


def run_summary(args, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    now = review.utc_now()
    with open_review(args) as rv:
        window = resolve_report_window(args, rv, now)
        data = load_figures(rv.store, window.since, window.until, include_shelved=args.include_shelved)
        write_summary(data, window, rv, out)
    return 0


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "summary", help="a shift's alarm figures as text, beside common reference rates",
        description="The alarm figures of one shift or time window (alarms per hour and per 10 minutes, "
                    "floods, the feeds with most alarms, repeating, standing and unacknowledged alarms, "
                    "shelved and stale feeds) beside reference rates of common practice. Alarms are advisory.")
    add_store_options(p)
    add_window_options(p, None)
    add_include_option(p)
    p.set_defaults(handler=run_summary)
