"""Applying the operators' ``accept`` notes to the running engine.

``leadline accept EVENT --by NAME --note TEXT`` appends an ``accept`` note
to a level-shift event (:mod:`leadline.adapters.cli.accept`): the operator
accepts the feed's new level as its normal. The service polls the store
for such notes every ``interval_s`` seconds and calls
``engine.accept_level(feed_id, at=note time, by=operator, note=text)`` for
each, oldest first; the events that call returns are staged like any other.

Exactly once: the id of the last note applied is staged as the service mark
:data:`MARK` together with those events and the feed's checkpoint, so they
commit in one transaction. After a restart the service reads the committed
mark and applies only newer notes; a note whose mark was not committed is
applied again, on the engine restored from the checkpoint of before it.

A note the engine refuses (an unknown feed, a feed with no level to
accept) is logged and passed over. An engine without ``accept_level``
leaves every note waiting, with one error line, so that a build that has
it applies them.
"""

from __future__ import annotations

import logging
import math
from typing import Any, Callable

from leadline.detector.errors import LeadlineError

logger = logging.getLogger("leadline.service")

#: The service mark holding the id of the last accept note applied.
MARK = "accept_notes_applied"


class AcceptPoller:
    """Polls the store for new ``accept`` notes and applies them to the engine.

    Parameters
    ----------
    store : EventSink
    interval_s : float
        Seconds between polls (monotonic clock).
    """

    def __init__(self, store: Any, interval_s: float = 5.0) -> None:
        self.store = store
        self.interval_s = float(interval_s)
        self.last_note_id: int | None = None
        self.applied = 0
        self._last_poll = -math.inf
        self._missing_logged = False

    def due(self, now_monotonic: float) -> bool:
        return now_monotonic - self._last_poll >= self.interval_s

    def poll(self, engine: Any, now_monotonic: float, handle: Callable[[Any], None]) -> int:
        """Apply the notes committed since the last one applied; ``handle`` stages each output.

        Returns the number of notes applied; the caller then stages the
        checkpoints, so that they commit with the mark. Store errors
        propagate (the caller retries at its next poll).
        """
        self._last_poll = now_monotonic
        if self.last_note_id is None:
            self.last_note_id = self.store.mark(MARK) or 0
        notes = self.store.accept_notes_after(self.last_note_id)
        if not notes:
            return 0
        accept = getattr(engine, "accept_level", None)
        if accept is None:
            if not self._missing_logged:
                logger.error("accept notes waiting: this engine has no accept_level; notes=%d first=%d",
                             len(notes), notes[0].note_id)
                self._missing_logged = True
            return 0
        done = 0
        for note in notes:
            try:
                out = accept(note.feed_id, at=note.at, by=note.operator, note=note.text)
            except LeadlineError as exc:
                logger.warning("accept note not applied: note=%d event=%d feed=%s error=%s",
                               note.note_id, note.event_id, note.feed_id, exc)
            else:
                handle(out)
                logger.info("accept note applied: note=%d event=%d feed=%s by=%s",
                            note.note_id, note.event_id, note.feed_id, note.operator)
                done += 1
            self.last_note_id = note.note_id
            self.store.stage_mark(MARK, note.note_id)
        self.applied += done
        return done
