"""Which events fall in a feed's shelving: hidden from the review listings unless asked for.

A shelving note shelves its feed from its time ``at`` until its expiry; a
later shelving note of the same feed replaces it from its own time on (so
``shelve --end``, a note whose expiry is its own time, ends it). An event
whose start falls in a shelving span of its feed is an event of a shelved
feed: recorded (and exported) as every other, not published, and left out
of ``events``, ``summary`` and ``report`` unless ``--include-shelved``.
"""

from __future__ import annotations

from datetime import datetime
from typing import Iterable, Sequence

from ..store.records import Note, StoredEvent

INCLUDE_HELP = "also list the events of shelved feeds (left out by default)"


def shelving_spans(notes: Iterable[Note]) -> dict[str, list[tuple[datetime, datetime]]]:
    """Per feed, the ``[start, end)`` spans it was shelved, from its shelving notes."""
    spans: dict[str, list[tuple[datetime, datetime]]] = {}
    for note in sorted((n for n in notes if n.kind == "shelve" and n.expires_at is not None),
                       key=lambda n: (n.feed_id, n.at, n.id)):
        feed = spans.setdefault(note.feed_id, [])
        if feed and feed[-1][1] > note.at:  # the newer note replaces the one in force
            start, _ = feed.pop()
            if note.at > start:
                feed.append((start, note.at))
        if note.expires_at > note.at:
            feed.append((note.at, note.expires_at))
    return spans


def split_shelved(events: Sequence[StoredEvent], notes: Iterable[Note]) -> tuple[list[StoredEvent], int]:
    """The events not of a shelved feed, and how many were left out."""
    spans = shelving_spans(notes)
    kept = [s for s in events
            if not any(a <= s.event.start < b for a, b in spans.get(s.event.feed_id, ()))]
    return kept, len(events) - len(kept)


def add_include_option(parser) -> None:
    parser.add_argument("--include-shelved", action="store_true", help=INCLUDE_HELP)
