"""The figures of one shift, as the report and the summary show them.

:func:`compute_figures` is pure: it takes the events of the window and what
the store says about the window's end (standing events, shelved feeds) and
returns :class:`ShiftFigures`. :func:`load_figures` reads them from a store.

Reference rates (common practice in alarm management, as ISA-18.2 and
EEMUA 191 present them; the numbers are from memory): on average about 6
alarms per hour per operator is very likely acceptable and about 12 the
most that can be managed; about 1 per 10 minutes acceptable, 2 at most; a
*flood* is more than 10 alarms in 10 minutes, and less than 1 % of the time
should be spent in one; the ten most frequent alarms should make up at most
a few percent (1 to 5 %) of all alarms over a month; no alarm should chatter
or repeat; fewer than 5 should be standing (active more than 24 h) on any day.

Definitions used here
---------------------
alarm
    One stored event (either severity) that started in the window.
flood period
    The union of the 10-minute intervals ``[t, t + 10 min)``, t an alarm's
    start, holding more than 10 alarm starts; the time in flood is its
    length within the window.
repeating alarm
    One rule on one feed starting :data:`REPEAT_MIN` or more episodes in the
    window.
standing alarm
    Active at the window's end and started at least 24 h before it.
stale feed
    A feed with a ``stale`` episode that started in the window or was active
    at its end.
"""

from __future__ import annotations

import bisect
from collections import Counter
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any, Sequence

from leadline.detector.durations import human_duration  # the one duration formatter of the package

from ..store.connect import read_transaction
from ..store.records import ModelRecord, Note, StoredEvent
from ..store.shift_queries import active_at

FLOOD_WINDOW = timedelta(minutes=10)
#: More than this many alarms in 10 minutes is a flood (common practice).
FLOOD_ALARMS = 10
#: Episodes of one rule on one feed in one window that make it a repeating alarm.
REPEAT_MIN = 3
STANDING_H = 24.0
TOP_FEEDS = 10
#: Bins of the alarm-rate plot.
RATE_BIN = timedelta(minutes=10)


def plural(n: int, word: str, many: str | None = None) -> str:
    """``1 alarm``, ``2 alarms``, ``0 alarms`` (``many`` for irregular plurals)."""
    return f"{n:,} {word if n == 1 else (many or word + 's')}"


@dataclass(frozen=True)
class FloodPeriod:
    start: datetime
    end: datetime
    alarms: int


@dataclass(frozen=True)
class FeedShare:
    feed_id: str
    alarms: int
    share: float  # of all alarms in the window, 0..1


@dataclass(frozen=True)
class Repeating:
    feed_id: str
    rule: str
    episodes: int


@dataclass(frozen=True)
class Incident:
    """Overlapping episodes of one feed, reviewed as one.

    ``end`` is None when an episode was still active at the window's end.
    """

    feed_id: str
    events: tuple[StoredEvent, ...]
    start: datetime
    end: datetime | None

    @property
    def rules(self) -> list[str]:
        return sorted({s.event.rule for s in self.events})

    @property
    def severity(self) -> str:
        return "alarm" if any(s.event.severity == "alarm" for s in self.events) else "warning"


@dataclass(frozen=True)
class ShiftFigures:
    since: datetime
    until: datetime
    events: tuple[StoredEvent, ...]
    floods: tuple[FloodPeriod, ...]
    peak_10min: int
    peak_10min_at: datetime | None
    top_feeds: tuple[FeedShare, ...]
    repeating: tuple[Repeating, ...]
    standing: tuple[StoredEvent, ...]
    unacked: tuple[StoredEvent, ...]
    shelved: tuple[Note, ...]
    stale_feeds: tuple[str, ...]
    rate_bins: tuple[tuple[datetime, int], ...]
    by_severity: dict[str, int] = field(default_factory=dict)

    @property
    def alarms(self) -> int:
        return len(self.events)

    @property
    def hours(self) -> float:
        return (self.until - self.since).total_seconds() / 3600.0

    @property
    def per_hour(self) -> float:
        return self.alarms / self.hours if self.hours > 0 else float("nan")

    @property
    def per_10min(self) -> float:
        return self.per_hour / 6.0

    @property
    def flood_seconds(self) -> float:
        return sum((f.end - f.start).total_seconds() for f in self.floods)

    @property
    def flood_fraction(self) -> float:
        span = (self.until - self.since).total_seconds()
        return self.flood_seconds / span if span > 0 else 0.0

    @property
    def top10_share(self) -> float:
        return sum(f.alarms for f in self.top_feeds) / self.alarms if self.alarms else 0.0


@dataclass(frozen=True)
class ReferenceRow:
    """One line of the figures-against-reference table."""

    figure: str
    value: str
    reference: str
    within: bool | None  # None: no reference rate applies


def _floods(starts: Sequence[datetime], since: datetime, until: datetime) -> tuple[list[FloodPeriod], int, Any]:
    intervals: list[tuple[datetime, datetime]] = []
    peak, peak_at = 0, None
    for i, t in enumerate(starts):
        j = bisect.bisect_left(starts, t + FLOOD_WINDOW)
        if j - i > peak:
            peak, peak_at = j - i, t
        if j - i > FLOOD_ALARMS:
            intervals.append((t, min(t + FLOOD_WINDOW, until)))
    merged: list[list[datetime]] = []
    for a, b in intervals:
        if merged and a <= merged[-1][1]:
            merged[-1][1] = max(merged[-1][1], b)
        else:
            merged.append([max(a, since), b])
    floods = [FloodPeriod(a, b, bisect.bisect_left(starts, b) - bisect.bisect_left(starts, a)) for a, b in merged]
    return floods, peak, peak_at


def _rate_bins(starts: Sequence[datetime], since: datetime, until: datetime) -> list[tuple[datetime, int]]:
    bins: list[tuple[datetime, int]] = []
    t = since
    while t < until:
        nxt = t + RATE_BIN
        bins.append((t, bisect.bisect_left(starts, nxt) - bisect.bisect_left(starts, t)))
        t = nxt
    return bins


def compute_figures(events: Sequence[StoredEvent], since: datetime, until: datetime,
                    standing: Sequence[StoredEvent] = (), shelved: Sequence[Note] = (),
                    stale_active: Sequence[StoredEvent] = ()) -> ShiftFigures:
    """The figures of the window ``[since, until)`` (see the module docstring).

    Parameters
    ----------
    events : StoredEvent
        The events that started in the window.
    standing : StoredEvent
        The events standing at ``until`` (:func:`.store.shift_queries.active_at`, 24 h).
    shelved : Note
        The shelving notes in force at ``until``.
    stale_active : StoredEvent
        ``stale`` events active at ``until``.
    """
    if until <= since:
        raise ValueError(f"the window must end after it starts: {since.isoformat()} to {until.isoformat()}")
    inside = sorted((s for s in events if since <= s.event.start < until), key=lambda s: (s.event.start, s.id))
    starts = [s.event.start for s in inside]
    floods, peak, peak_at = _floods(starts, since, until)
    per_feed = Counter(s.event.feed_id for s in inside)
    n = len(inside)
    top = sorted(per_feed.items(), key=lambda kv: (-kv[1], kv[0]))[:TOP_FEEDS]
    per_rule = Counter((s.event.feed_id, s.event.rule) for s in inside)
    repeating = sorted((Repeating(f, r, c) for (f, r), c in per_rule.items() if c >= REPEAT_MIN),
                       key=lambda x: (-x.episodes, x.feed_id, x.rule))
    stale = sorted({s.event.feed_id for s in inside if s.event.rule == "stale"}
                   | {s.event.feed_id for s in stale_active})
    return ShiftFigures(
        since=since,
        until=until,
        events=tuple(inside),
        floods=tuple(floods),
        peak_10min=peak,
        peak_10min_at=peak_at,
        top_feeds=tuple(FeedShare(f, c, c / n) for f, c in top),
        repeating=tuple(repeating),
        standing=tuple(standing),
        unacked=tuple(s for s in inside if not s.acknowledged),
        shelved=tuple(shelved),
        stale_feeds=tuple(stale),
        rate_bins=tuple(_rate_bins(starts, since, until)),
        by_severity=dict(Counter(s.event.severity for s in inside)),
    )


def _pct(x: float) -> str:
    return f"{100 * x:.1f} %"


def reference_rows(fig: ShiftFigures) -> list[ReferenceRow]:
    """The shift's figures beside the reference rates of common practice (module docstring)."""
    top_share = fig.top10_share
    return [
        ReferenceRow("Alarms per hour (average)", f"{fig.per_hour:.1f}",
                     "about 6 acceptable, 12 at most", fig.per_hour <= 6.0),
        ReferenceRow("Alarms per 10 minutes (average)", f"{fig.per_10min:.2f}",
                     "about 1 acceptable, 2 at most", fig.per_10min <= 1.0),
        ReferenceRow("Most alarms in any 10 minutes", str(fig.peak_10min),
                     f"{FLOOD_ALARMS} or fewer (more is a flood)", fig.peak_10min <= FLOOD_ALARMS),
        ReferenceRow("Floods (more than 10 alarms in 10 minutes)", str(len(fig.floods)), "none", not fig.floods),
        ReferenceRow("Time in flood", f"{_pct(fig.flood_fraction)} ({human_duration(fig.flood_seconds)})",
                     "under 1 %", fig.flood_fraction < 0.01),
        ReferenceRow("Share of alarms from the ten feeds with most", _pct(top_share) if fig.alarms else "-",
                     "1 to 5 % over a month (one shift is a small sample)",
                     None if not fig.alarms else top_share <= 0.05),
        ReferenceRow(f"Repeating alarms ({REPEAT_MIN} or more episodes of one rule on one feed)",
                     str(len(fig.repeating)), "none", not fig.repeating),
        ReferenceRow("Standing alarms (active more than 24 h at the end)", str(len(fig.standing)),
                     "fewer than 5", len(fig.standing) < 5),
        ReferenceRow("Unacknowledged alarms", str(len(fig.unacked)), "-", None),
        ReferenceRow("Shelved feeds at the end", str(len(fig.shelved)), "-", None),
        ReferenceRow("Stale feeds (gone silent)", str(len(fig.stale_feeds)), "-", None),
    ]


def group_incidents(events: Sequence[StoredEvent], until: datetime) -> list[Incident]:
    """The incidents of ``events``, oldest first.

    Events the engine grouped (``incident_start``, :mod:`leadline.detector.incidents`) keep
    that grouping, so the report counts incidents as ``leadline events`` lists them. Events
    stored without one (older stores) group as episodes of one feed whose spans overlap
    (an active one runs to ``until``).
    """
    by_feed: dict[str, list[StoredEvent]] = {}
    tagged: dict[tuple[str, datetime], list[StoredEvent]] = {}
    for s in sorted(events, key=lambda s: (s.event.start, s.id)):
        if s.event.incident_start is not None:
            tagged.setdefault((s.event.feed_id, s.event.incident_start), []).append(s)
        else:
            by_feed.setdefault(s.event.feed_id, []).append(s)
    incidents: list[Incident] = [_incident(feed_id, group) for (feed_id, _), group in tagged.items()]
    for feed_id, items in by_feed.items():
        group: list[StoredEvent] = []
        group_end: datetime | None = None
        for s in items:
            end = s.event.end or until
            if group and s.event.start <= group_end:
                group.append(s)
                group_end = max(group_end, end)
                continue
            if group:
                incidents.append(_incident(feed_id, group))
            group, group_end = [s], end
        if group:
            incidents.append(_incident(feed_id, group))
    return sorted(incidents, key=lambda i: (i.start, i.feed_id))


def _incident(feed_id: str, group: list[StoredEvent]) -> Incident:
    ends = [s.event.end for s in group]
    return Incident(feed_id, tuple(group), min(s.event.start for s in group),
                    None if any(e is None for e in ends) else max(ends))


def _period_words(period_s: float) -> str:
    days = period_s / 86400.0
    if abs(days - round(days)) < 1e-9:
        return f"{int(round(days))}-day"
    return f"{period_s / 3600.0:g}-hour"


def model_in_words(model: ModelRecord | None, unit: str | None = None) -> str:
    """A sentence or two about the model that scored an episode, from its record."""
    if model is None:
        return "No model record was found for this feed."
    stats = model.fit_stats or {}
    days = (model.window_end - model.window_start).total_seconds() / 86400.0
    reason = model.reason.replace("_", " ")
    text = (f"{model.order} (model version {model.version}), fitted on {days:.1f} days of readings from "
            f"{model.window_start:%Y-%m-%d} to {model.window_end:%Y-%m-%d} ({reason}).")
    calendar = stats.get("calendar")
    if isinstance(calendar, dict):
        terms = [f"a {_period_words(float(p))} cycle with {plural(int(k), 'harmonic')}"
                 for p, k in calendar.get("periods") or []]
        if calendar.get("weekend"):
            terms.append("a weekend term")
        if calendar.get("holidays"):
            terms.append("a holiday term")
        if terms:
            text += " Calendar terms: " + ", ".join(terms) + "."
    sigma2 = stats.get("sigma2")
    if isinstance(sigma2, (int, float)) and sigma2 > 0:
        text += f" Shock standard deviation {sigma2 ** 0.5:.3g}" + (f" {unit}" if unit else "") + "."
    lb = stats.get("ljung_box_pvalue")
    if isinstance(lb, (int, float)):
        text += f" Ljung-Box p = {lb:.2g} on its residuals."
    problems = stats.get("problems") or []
    if problems:
        text += " Fit problems: " + "; ".join(str(p) for p in problems) + "."
    return text


@dataclass
class ShiftData:
    """Everything the report and the summary show about one window."""

    figures: ShiftFigures
    incidents: list[Incident]
    models: dict[tuple[str, int | None], ModelRecord | None]
    units: dict[str, str | None]
    store_url: str
    #: Events of the window left out as events of shelved feeds (0 with ``include_shelved``).
    shelved_hidden: int = 0


def load_figures(store: Any, since: datetime, until: datetime, include_shelved: bool = False) -> ShiftData:
    """Read the window's events and what the figures need from ``store``.

    The events of shelved feeds (started while their feed was shelved) are
    left out unless ``include_shelved``; ``ShiftData.shelved_hidden`` counts them.
    """
    from ..cli.shelving import split_shelved

    events = store.events(since=since, until=until)
    with read_transaction(store.engine, "reading standing events") as conn:
        standing = active_at(conn, until, STANDING_H)
        stale_active = active_at(conn, until, 0.0, rule="stale")
    hidden = 0
    if not include_shelved:
        notes = store.shelving_notes()
        events, hidden = split_shelved(events, notes)
        standing, _ = split_shelved(standing, notes)
        stale_active, _ = split_shelved(stale_active, notes)
    figures = compute_figures(events, since, until, standing, store.shelved_feeds(until), stale_active)
    incidents = group_incidents(figures.events, until)
    models: dict[tuple[str, int | None], ModelRecord | None] = {}
    for feed_id in sorted({i.feed_id for i in incidents}):
        records = store.models(feed_id)
        by_version = {m.version: m for m in records}
        latest = records[-1] if records else None
        for inc in incidents:
            if inc.feed_id != feed_id:
                continue
            for s in inc.events:
                v = s.event.model_version
                models[(feed_id, v)] = by_version.get(v, latest) if v is not None else latest
    units = {f.feed_id: f.unit for f in store.feeds()}
    # the unit the service last recorded (configured, or from the payloads) labels the plots' axes
    units.update({fid: row.unit for fid, row in store.feed_status().items() if row.unit})
    return ShiftData(figures, incidents, models, units, store.url, hidden)
