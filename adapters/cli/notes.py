"""``leadline ack``, ``note``, ``shelve`` and ``accept``: entries of the audit trail.

Each appends a note to the store and never edits one: acknowledging again
adds a second acknowledgement, and ``shelve FEED --end`` ends a shelving by
a new note whose expiry is now (the latest shelving note of a feed decides).
Notes carry the operator's name (``--by``) and the time of the command.

``leadline accept EVENT`` accepts the level shift of a level-shift event as
the feed's new normal: an ``accept`` note, which the running service
applies to the engine within a few seconds
(:mod:`leadline.adapters.service.accepts`).
"""

from __future__ import annotations

import sys
from datetime import timedelta
from typing import TextIO

from fnmatch import fnmatchcase

from leadline.detector.durations import human_duration, parse_duration_s
from leadline.detector.errors import DataError, SpecError, StoreError

from . import review
from ..config.shelving import DEFAULT_MAX_SHELVE_S
from ..config.values import did_you_mean
from .words import plural
from .review import add_store_options, open_review, show_time
from ..sinks.safe_text import safe_text
from ..store.reads import EventQueries
from ..store.records import StoredEvent


def _events(store: EventQueries, ids: list[int], command: str) -> list[StoredEvent]:
    """The events with these ids (each once); an error naming every unknown one."""
    unique = list(dict.fromkeys(ids))
    found = {i: store.event(i) for i in unique}
    missing = [i for i, e in found.items() if e is None]
    if missing:
        what = "ids" if len(missing) > 1 else "id"
        raise StoreError(f"no event with {what} {', '.join(map(str, missing))} in {store.url}; nothing was "
                         f"{command}. List event ids with: leadline events")
    return [found[i] for i in unique]  # type: ignore[misc]


def _describe(stored: StoredEvent, zone) -> str:
    ev = stored.event
    return f"event {stored.id} ({ev.feed_id} {ev.rule} {ev.severity}, started {show_time(ev.start, zone)})"


def run_ack(args, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    require_flag(args.by, "--by")
    with open_review(args) as rv:
        events = _events(rv.store, args.event, "acknowledged")
        now = review.utc_now()
        for stored in events:
            before = next((n for n in stored.notes if n.kind == "ack"), None)
            note_id = rv.store.add_note(stored.id, "ack", args.by, args.note or "", at=now)
            again = f"; it was already acknowledged by {before.operator} at {show_time(before.at, rv.zone)}" \
                if before else ""
            print(safe_text(f"Acknowledged {_describe(stored, rv.zone)} as {args.by} (note {note_id}){again}."),
                  file=out)
    return 0


def run_note(args, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    require_flag(args.by, "--by")
    require_flag(args.note, "--note")
    with open_review(args) as rv:
        (stored,) = _events(rv.store, [args.event], "noted")
        note_id = rv.store.add_note(stored.id, "comment", args.by, args.note, at=review.utc_now())
        print(safe_text(f"Added note {note_id} to {_describe(stored, rv.zone)}."), file=out)
    return 0


def require_flag(value: str | None, flag: str) -> str:
    """The value of ``flag``, refused when empty or blank ("--by must not be empty")."""
    if value is None or not value.strip():
        raise DataError(f"{flag} must not be empty")
    return value


def _max_shelve_s(rv) -> float:
    return rv.config.shelving.max_duration_s if rv.config is not None else DEFAULT_MAX_SHELVE_S


def _matching_feeds(pattern: str, feeds: list[str], url: str) -> list[str]:
    if not any(c in pattern for c in "*?["):
        if pattern in feeds:
            return [pattern]
        hint = did_you_mean(pattern, feeds)
        raise StoreError(f"no feed {pattern!r} in {url}" + (f"; {hint}" if hint else "")
                         + "; nothing was shelved. List feeds with: leadline status")
    matched = [f for f in feeds if fnmatchcase(f, pattern)]
    if not matched:
        raise StoreError(f"no feed matches {pattern!r} in {url}; nothing was shelved. List feeds with: "
                         "leadline status")
    return matched


def run_shelve(args, out: TextIO | None = None) -> int:
    """Shelve one feed or a glob of feeds (one note each), or end their shelving with ``--end``."""
    out = out or sys.stdout
    require_flag(args.by, "--by")
    require_flag(args.note, "--note")
    if args.end == bool(args.duration):
        raise DataError("give --for DURATION (such as 8h) to shelve, or --end to end a shelving now")
    span_s = 0.0
    if args.duration:
        try:
            span_s = parse_duration_s(args.duration)
        except SpecError as exc:
            raise DataError(f"--for {args.duration!r}: expected a duration such as 30min, 8h or 2d") from exc
    with open_review(args) as rv:
        longest_s = _max_shelve_s(rv)
        if span_s > longest_s:
            raise DataError(f"--for {args.duration}: longer than the longest shelving, {human_duration(longest_s)} "
                            "([shelving] max_duration in the config); shelve again when it ends")
        targets = _matching_feeds(args.feed, [f.feed_id for f in rv.store.feeds()], rv.store.url)
        now = review.utc_now()
        in_force = {n.feed_id: n for n in rv.store.shelved_feeds(now)}
        if args.end:
            unshelved = [f for f in targets if f not in in_force]
            if len(unshelved) == len(targets):
                raise DataError(f"--end: {args.feed} is not shelved" if len(targets) == 1 else
                                f"--end: no feed matching {args.feed!r} is shelved; nothing was ended")
            targets = [f for f in targets if f in in_force]
        until = now + timedelta(seconds=span_s)
        for feed in targets:
            before = in_force.get(feed)
            note_id = rv.store.shelve(feed, args.by, args.note, until, at=now)
            if args.end:
                print(safe_text(f"Ended the shelving of {feed} by {before.operator} (note {before.id}, until "
                                f"{show_time(before.expires_at, rv.zone)}) as {args.by} (note {note_id})."),
                      file=out)
                continue
            replaces = "" if before is None else (
                f"; this replaces the shelving by {before.operator} until {show_time(before.expires_at, rv.zone)} "
                f"(note {before.id})")
            print(safe_text(f"Shelved {feed} until {show_time(until, rv.zone)} as {args.by} (note {note_id})"
                            f"{replaces}."), file=out)
        if len(targets) > 1:
            print(f"{plural(len(targets), 'feed')} {'unshelved' if args.end else 'shelved'}; each shelving is a note "
                  "of its own in the audit trail.", file=out)
    return 0


#: Rules whose episodes are not a move of the feed's level: nothing to accept.
NOT_A_LEVEL_SHIFT = frozenset({"spike", "noise_burst", "flatline", "range", "stale", "meter_reset"})


def run_accept(args, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    with open_review(args) as rv:
        (stored,) = _events(rv.store, [args.event], "accepted")
        if stored.event.rule in NOT_A_LEVEL_SHIFT:
            raise StoreError(f"{_describe(stored, rv.zone)} is not a level shift; nothing was accepted. Accept the "
                             "level-shift event of its incident (ids: leadline events --each-event)")
        before = next((n for n in stored.notes if n.kind == "accept"), None)
        note_id = rv.store.add_note(stored.id, "accept", args.by, args.note, at=review.utc_now())
        again = f"; it was already accepted by {before.operator} at {show_time(before.at, rv.zone)}" \
            if before else ""
        print(safe_text(f"Accepted the level of {_describe(stored, rv.zone)} as {args.by} (note {note_id}){again}. "
                        "The running service applies it within seconds."), file=out)
    return 0


def _common(p, note_required: bool) -> None:
    add_store_options(p)
    p.add_argument("--by", required=True, metavar="NAME", help="who is writing this (kept in the audit trail)")
    p.add_argument("--note", required=note_required, metavar="TEXT",
                   help="what was found or done" + ("" if note_required else " (optional)"))


def add_parser(subparsers) -> None:
    """Registers ``ack``, ``note`` and ``shelve``."""
    p = subparsers.add_parser("ack", help="acknowledge events",
                              description="Acknowledge one or more events: an entry in the audit trail "
                                          "with your name, the time and an optional note.")
    p.add_argument("event", nargs="+", type=int, metavar="EVENT", help="event id, as listed by leadline events")
    _common(p, note_required=False)
    p.set_defaults(handler=run_ack)

    p = subparsers.add_parser("note", help="add a comment to an event",
                              description="Add a comment to an event's audit trail.")
    p.add_argument("event", type=int, metavar="EVENT", help="event id, as listed by leadline events")
    _common(p, note_required=True)
    p.set_defaults(handler=run_note)

    p = subparsers.add_parser("shelve", help="shelve a feed for a while",
                              description="Shelve a feed or a glob of feeds (for example during maintenance) "
                                          "for a stated time, with your name and the reason: their alarms are "
                                          "still recorded, but not published and not listed by default. "
                                          "--end ends a shelving early. Every shelving stays in the audit trail.")
    p.add_argument("feed", metavar="FEED", help="the feed id, as listed by leadline status, or a glob of feeds "
                                                "such as 'fenwick/*/flow' (quote it)")
    group = p.add_mutually_exclusive_group()
    group.add_argument("--for", dest="duration", metavar="DURATION",
                       help="how long, such as 30min, 8h or 2d (at most [shelving] max_duration, default 7d)")
    group.add_argument("--end", action="store_true", help="end the feed's shelving now")
    _common(p, note_required=True)
    p.set_defaults(handler=run_shelve)

    p = subparsers.add_parser("accept", help="accept a level shift as the feed's new normal",
                              description="Accept the new level of a level-shift event as the feed's normal: "
                                          "an entry in the audit trail with your name, the time and why; the "
                                          "running service then stops alarming on that level.")
    p.add_argument("event", type=int, metavar="EVENT", help="the level-shift event's id (leadline events)")
    _common(p, note_required=True)
    p.set_defaults(handler=run_accept)
