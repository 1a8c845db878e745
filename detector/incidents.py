"""Incidents: the signals of several rules on one feed, within one condition, as one thing to review.

One abnormal condition often trips several rules: a leak gives a spike at
its first reading and a level shift after it; a noisy transmitter gives a
noise burst and a spike. Each rule keeps its own episode (its own
:class:`~leadline.detector.events.AlarmEvent`, with its own detail), and an
:class:`IncidentGrouper` gives every event of a feed the *incident* it
belongs to: the start of the first event of the group. The operator's
listing shows one line per incident with its rules.

An event joins the feed's current incident when it opens while another
event of the incident is still active, or within ``gap_s`` after the last
one cleared; otherwise it starts a new incident. A ``meter_reset`` is a
fact about the register, not an abnormal condition: it always stands alone
and does not extend an incident.

The incident's identity is ``(feed_id, incident_start)``: deterministic,
so a replay of the same readings gives the same incidents, and the store
needs no counter to name them.
"""

from __future__ import annotations

from dataclasses import replace
from datetime import datetime, timedelta
from typing import Any

from .errors import RuleError, StateFormatError
from .events import AlarmEvent

#: Version of :meth:`IncidentGrouper.state_dict`.
STATE_VERSION = 1
#: Rules whose events stand alone.
STANDALONE_RULES = frozenset({"meter_reset"})


def _iso(when: datetime | None) -> str | None:
    return None if when is None else when.isoformat()


def _from_iso(text: str | None) -> datetime | None:
    return None if text is None else datetime.fromisoformat(text)


class IncidentGrouper:
    """Assigns each event of one feed to an incident.

    Parameters
    ----------
    gap_s : float
        An event opening at most this long after the incident's last event
        cleared joins the incident (>= 0, seconds).
    """

    def __init__(self, gap_s: float = 0.0) -> None:
        if not gap_s >= 0:
            raise RuleError(f"incident gap_s must be a number >= 0, got {gap_s!r}")
        self.gap = timedelta(seconds=float(gap_s))
        self._start: datetime | None = None
        self._open: dict[tuple[str, datetime], datetime] = {}
        self._last_end: datetime | None = None

    @property
    def current_start(self) -> datetime | None:
        """The start of the incident that is open or may still be extended, or None."""
        return self._start

    @property
    def open_events(self) -> int:
        return len(self._open)

    def tag(self, event: AlarmEvent) -> AlarmEvent:
        """The event with its ``incident_start`` set (an onset, a clearing, or both at once)."""
        if event.rule in STANDALONE_RULES:
            return replace(event, incident_start=event.start)
        key = (event.rule, event.start)
        incident = self._open.get(key)
        if incident is None:
            incident = self._join_or_start(event.start)
            if event.end is None:
                self._open[key] = incident
        elif event.end is not None:
            del self._open[key]
        if event.end is not None:
            self._last_end = event.end if self._last_end is None else max(self._last_end, event.end)
        return replace(event, incident_start=incident)

    def state_dict(self) -> dict[str, Any]:
        return {"v": STATE_VERSION, "start": _iso(self._start), "last_end": _iso(self._last_end),
                "open": [[rule, _iso(start), _iso(incident)] for (rule, start), incident in self._open.items()]}

    def load_state(self, state: dict[str, Any]) -> None:
        if not isinstance(state, dict) or state.get("v") != STATE_VERSION:
            raise StateFormatError(f"incident state: version {state.get('v') if isinstance(state, dict) else state!r} "
                                   f"is not {STATE_VERSION}")
        try:
            self._start = _from_iso(state["start"])
            self._last_end = _from_iso(state["last_end"])
            self._open = {(rule, _from_iso(start)): _from_iso(incident) for rule, start, incident in state["open"]}
        except (KeyError, TypeError, ValueError) as exc:
            raise StateFormatError(f"incident state is malformed: {exc}") from exc

    # ------------------------------------------------------------- internals
    def _join_or_start(self, when: datetime) -> datetime:
        joins = self._start is not None and (
            bool(self._open) or (self._last_end is not None and when - self._last_end <= self.gap))
        if not joins:
            self._start = when
            self._last_end = None
        return self._start
