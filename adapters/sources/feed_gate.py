"""A bound on the feeds one source may create: ``max_feeds`` distinct ids, each of bounded length.

A source that trusts its input creates a feed (a model, a checkpoint, rows
in the store) for every new id it reads; a misconfigured or hostile
publisher sending a new topic per message would grow memory without end.
:class:`FeedGate` admits the first ``max_feeds`` distinct feed ids a source
produces and rejects readings of any further new id with reason
``feed_limit`` (counted like every reject, never created). A feed id longer
than ``max_feed_id_chars`` is rejected with ``feed_id_too_long``, one
holding a NUL character with ``bad_feed`` (PostgreSQL text cannot store it,
so it would fail every flush).

The set of admitted ids lives in memory and starts empty at each start of
the service: after a restart the first ``max_feeds`` ids seen are admitted
again.
"""

from __future__ import annotations

from typing import Callable

from leadline.detector.errors import ConfigError, RejectError
from leadline.detector.readings import Reading

DEFAULT_MAX_FEEDS = 100_000
DEFAULT_MAX_FEED_ID_CHARS = 256


class FeedGate:
    """Admits at most ``max_feeds`` distinct feed ids.

    Parameters
    ----------
    source : str
        The source's name, for messages.
    reject : callable
        Called with the :class:`~leadline.detector.errors.RejectError` of
        each reading refused (the source's reject log).
    max_feeds : int
    max_feed_id_chars : int
    """

    def __init__(self, source: str, reject: Callable[[RejectError], None], max_feeds: int = DEFAULT_MAX_FEEDS,
                 max_feed_id_chars: int = DEFAULT_MAX_FEED_ID_CHARS) -> None:
        if not isinstance(max_feeds, int) or max_feeds < 1:
            raise ConfigError(f"{source}: max_feeds must be an integer >= 1, got {max_feeds!r}")
        if not isinstance(max_feed_id_chars, int) or max_feed_id_chars < 1:
            raise ConfigError(f"{source}: max_feed_id_chars must be an integer >= 1, got {max_feed_id_chars!r}")
        self.source = source
        self.max_feeds = max_feeds
        self.max_feed_id_chars = max_feed_id_chars
        self._reject = reject
        self._known: set[str] = set()

    def __len__(self) -> int:
        return len(self._known)

    def check(self, feed_id: str, where: str = "") -> RejectError | None:
        """None when ``feed_id`` is admitted (remembering it), else the reject."""
        known = self._known
        if feed_id in known:
            return None
        if "\x00" in feed_id:  # PostgreSQL text cannot hold NUL: such a feed would fail every flush
            return RejectError("bad_feed", "feed id contains a NUL character", where)
        if len(feed_id) > self.max_feed_id_chars:
            return RejectError("feed_id_too_long", f"feed id of {len(feed_id)} characters "
                               f"({feed_id[:40]!r}...); expected at most {self.max_feed_id_chars}", where)
        if len(known) >= self.max_feeds:
            return RejectError("feed_limit", f"new feed {feed_id[:80]!r} refused: this source already has "
                               f"{self.max_feeds} feeds (max_feeds)", where)
        known.add(feed_id)
        return None

    def screen_tail(self, out: list[Reading], start: int, where: str, line_number: int = 0) -> int:
        """Drop the readings ``out[start:]`` of refused feeds (each rejected); return ``len(out)``.

        ``where`` (and ``line_number`` when not 0) name the record in reject samples.
        """
        known = self._known
        for i in range(start, len(out)):
            if out[i].feed_id not in known:
                break
        else:
            return len(out)  # all known: the common case, nothing to change
        place = f"{where}:{line_number}" if line_number else where
        kept = []
        for reading in out[start:]:
            error = self.check(reading.feed_id, place)
            if error is None:
                kept.append(reading)
            else:
                self._reject(error)
        out[start:] = kept
        return len(out)


__all__ = ["DEFAULT_MAX_FEEDS", "DEFAULT_MAX_FEED_ID_CHARS", "FeedGate"]
