"""The event store's tables, as SQLAlchemy Core objects.

:func:`build_metadata` describes the schema at a given version; the current
one is :data:`SCHEMA_VERSION`. :mod:`.migrations` creates a fresh database
from it and upgrades older ones step by step.

Tables
------
``leadline_schema_version``
    One row per applied schema version (the highest is in force).
``feeds``
    One row per feed: unit, sampling interval, source name.
``models``
    One row per fit of a feed's model, numbered 1, 2, ... per feed.
``events``
    One row per alarm episode, unique on its key (feed, rule, start).
``event_notes``
    Acknowledgements and comments (of one event) and shelving notes (of a
    feed, with an expiry). Append-only: triggers refuse UPDATE and DELETE.
``checkpoints``
    The latest stream state bytes and model version per feed.
``source_offsets``
    Per followed file: device, inode and the committed byte offset.
``reject_counts``, ``reject_samples``
    Rejected input: a count per (source, reason) and a bounded sample.
``evidence``
    The readings and forecasts around each alarm episode, keyed like the
    event (start, feed, rule); packed by :mod:`.evidence`. Added in schema
    version 3.
``feed_status``
    One row per feed as the running service last saw it: lifecycle state,
    last reading (time, value), source, unit, learning progress; upserted
    with the flushes, only for the feeds that changed. Added in schema
    version 4 (step ``_add_feed_status``).
``service_heartbeat``
    One row per running service: start time, last beat, beat interval,
    process id, leadline version. Added in schema version 4.
``journal_feeds``, ``journal``
    The journal of accepted readings and each feed's snapshot with the
    journal position it covers (:mod:`.journal`). Added in schema version 6
    (step ``_add_journal``).

Indexes (and the query each one serves)
---------------------------------------
``uq_events_key (start_at, feed_id, rule)``
    The upsert key. Time comes first because events arrive in time order:
    new keys append at the right edge of the index instead of dirtying one
    page per feed and rule in every batch. Measured here on SQLite with
    200,000 events stored, 500 per flush: about 60,000 events/s against about
    20,000 with ``(feed_id, rule, start_at)`` plus a separate time index.
    The same index serves listings by time window and alarm counts per feed
    over a window (covering: no table access).
``ix_events_hour (start_hour, severity)``
    Alarm counts per UTC hour (covering: an index-only range scan whose
    order is already the GROUP BY order). Added in schema version 2.
``ix_events_standing (start_at) WHERE end_at IS NULL``
    Partial index over the active events only: "standing longer than 24 h".
``ix_event_notes_event (event_id, kind)``
    The notes of listed events, and the acknowledged / unacknowledged filter.
``ix_event_notes_feed (feed_id, kind, at)``
    Active shelving notes per feed.
"""

from __future__ import annotations

from sqlalchemy import (
    BigInteger,
    Double,
    CheckConstraint,
    Column,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    PrimaryKeyConstraint,
    Table,
    Text,
    UniqueConstraint,
)

from leadline.detector.events import SEVERITIES

from .coltypes import JSONText, NanFloat, UInt64, UTCDateTime
from .journal import add_journal_tables
from .dialects import SURROGATE_ID, make_notes_append_only, partial_index_where

#: The schema version this build writes and reads.
SCHEMA_VERSION = 6

#: Note kinds at each schema version: "accept" (an operator accepts a
#: level shift as the feed's new normal) came with version 4.
NOTE_KINDS_V1 = ("ack", "comment", "shelve")
NOTE_KINDS = NOTE_KINDS_V1 + ("accept",)

_NAMING = {
    "ix": "ix_%(table_name)s_%(column_0_name)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

# A surrogate id: INTEGER PRIMARY KEY (the rowid) on SQLite, BIGINT elsewhere.
_Id = SURROGATE_ID


def _utc(name: str, nullable: bool = False) -> Column:
    return Column(name, UTCDateTime(), nullable=nullable)


def build_metadata(version: int = SCHEMA_VERSION) -> MetaData:
    """The tables of the event store at schema ``version``.

    Parameters
    ----------
    version : int
        1 (the first release) up to :data:`SCHEMA_VERSION`.

    Returns
    -------
    sqlalchemy.MetaData
        A fresh MetaData; build one per use, the objects are not shared.

    Notes
    -----
    Version 2 added ``events.start_hour`` (whole hours since
    1970-01-01T00:00Z of ``start_at``, written by the store) and its
    index ``ix_events_hour``, so counting alarms per hour is an index-only
    scan on both backends instead of a per-row date expression. Version 3
    added the ``evidence`` table; version 4 ``feed_status`` and
    ``service_heartbeat``. Version 5 added ``events.incident_start``
    (the start of the event's incident, :mod:`leadline.detector.incidents`),
    the note kind ``accept`` and the ``service_marks`` table.
    """
    if not 1 <= version <= SCHEMA_VERSION:
        raise ValueError(f"schema version must be 1..{SCHEMA_VERSION}, got {version}")
    md = MetaData(naming_convention=_NAMING)

    Table(
        "leadline_schema_version",
        md,
        Column("version", Integer, primary_key=True, autoincrement=False),
        _utc("applied_at"),
        Column("description", Text, nullable=False),
    )

    Table(
        "feeds",
        md,
        Column("feed_id", Text, primary_key=True),
        Column("unit", Text),
        Column("interval_s", Double),
        Column("source", Text),
        _utc("created_at"),
    )

    Table(
        "models",
        md,
        Column("feed_id", Text, ForeignKey("feeds.feed_id"), nullable=False),
        Column("version", Integer, nullable=False, autoincrement=False),
        Column("model_order", Text, nullable=False),
        Column("parameters", JSONText(), nullable=False),
        Column("thresholds", JSONText(), nullable=False),
        Column("fit_stats", JSONText(), nullable=False),
        _utc("fitted_at"),
        _utc("window_start"),
        _utc("window_end"),
        Column("reason", Text, nullable=False),
        _utc("recorded_at"),
        PrimaryKeyConstraint("feed_id", "version"),
        CheckConstraint("version >= 1", name="version_positive"),
    )

    severities = ", ".join(f"'{s}'" for s in SEVERITIES)
    event_columns = [
        Column("id", _Id, primary_key=True, autoincrement=True),
        Column("feed_id", Text, ForeignKey("feeds.feed_id"), nullable=False),
        Column("rule", Text, nullable=False),
        Column("severity", Text, nullable=False),
        _utc("start_at"),
        _utc("end_at", nullable=True),
        Column("peak_abs_z", NanFloat()),
        Column("value_at_onset", NanFloat()),
        Column("forecast_at_onset", NanFloat()),
        Column("lower_at_onset", NanFloat()),
        Column("upper_at_onset", NanFloat()),
        Column("parameters", JSONText(), nullable=False),
        Column("model_version", Integer),
        Column("detail", Text, nullable=False),
        Column("caution", Text, nullable=False),
        _utc("created_at"),
        _utc("updated_at"),
    ]
    if version >= 2:
        # Nullable only because ALTER TABLE ADD COLUMN cannot add a NOT NULL
        # column without a default; the writer always fills it.
        event_columns.append(Column("start_hour", BigInteger))
    if version >= 5:
        # NULL for an event stored without an incident (and for every event
        # stored before version 5): it is then an incident of its own.
        event_columns.append(_utc("incident_start", nullable=True))
    events = Table(
        "events",
        md,
        *event_columns,
        # Time first: the service inserts in time order, so new keys land at
        # the right edge of this index instead of on one page per feed.
        UniqueConstraint("start_at", "feed_id", "rule", name="uq_events_key"),
        CheckConstraint(f"severity IN ({severities})", name="severity_known"),
    )
    Index(
        "ix_events_standing",
        events.c.start_at,
        **partial_index_where("end_at IS NULL"),
    )
    if version >= 2:
        Index("ix_events_hour", events.c.start_hour, events.c.severity)

    kinds = ", ".join(f"'{k}'" for k in (NOTE_KINDS if version >= 5 else NOTE_KINDS_V1))
    notes = Table(
        "event_notes",
        md,
        Column("id", _Id, primary_key=True, autoincrement=True),
        Column("event_id", _Id, ForeignKey("events.id"), nullable=True),
        Column("feed_id", Text, ForeignKey("feeds.feed_id"), nullable=False),
        Column("kind", Text, nullable=False),
        Column("operator", Text, nullable=False),
        Column("text", Text, nullable=False),
        _utc("at"),
        _utc("expires_at", nullable=True),
        CheckConstraint(f"kind IN ({kinds})", name="kind_known"),
        CheckConstraint(
            "(kind = 'shelve' AND event_id IS NULL AND expires_at IS NOT NULL)"
            " OR (kind <> 'shelve' AND event_id IS NOT NULL AND expires_at IS NULL)",
            name="kind_fields",
        ),
        CheckConstraint("operator <> ''", name="operator_named"),
    )
    Index("ix_event_notes_event", notes.c.event_id, notes.c.kind)
    Index("ix_event_notes_feed", notes.c.feed_id, notes.c.kind, notes.c.at)
    make_notes_append_only(notes)

    Table(
        "checkpoints",
        md,
        Column("feed_id", Text, ForeignKey("feeds.feed_id"), primary_key=True),
        Column("state", LargeBinary, nullable=False),
        Column("model_version", Integer, nullable=False),
        _utc("updated_at"),
    )

    Table(
        "source_offsets",
        md,
        Column("source", Text, nullable=False),
        Column("path", Text, nullable=False),
        Column("device", UInt64(), nullable=False),
        Column("inode", UInt64(), nullable=False),
        Column("offset_bytes", BigInteger, nullable=False),
        _utc("updated_at"),
        PrimaryKeyConstraint("source", "path"),
        CheckConstraint("offset_bytes >= 0", name="offset_nonnegative"),
    )

    Table(
        "reject_counts",
        md,
        Column("source", Text, nullable=False),
        Column("reason", Text, nullable=False),
        Column("count", BigInteger, nullable=False),
        _utc("first_seen"),
        _utc("last_seen"),
        PrimaryKeyConstraint("source", "reason"),
    )

    samples = Table(
        "reject_samples",
        md,
        Column("id", _Id, primary_key=True, autoincrement=True),
        Column("source", Text, nullable=False),
        Column("reason", Text, nullable=False),
        Column("location", Text, nullable=False),
        Column("detail", Text, nullable=False),
        Column("raw", LargeBinary, nullable=False),
        _utc("seen_at"),
    )
    Index("ix_reject_samples_source", samples.c.source, samples.c.reason, samples.c.id)
    if version >= 3:
        _evidence_table(md)
    if version >= 4:
        feed_status_tables(md)
    if version >= 5:
        _service_marks_table(md)
    if version >= 6:
        add_journal_tables(md)
    return md


def feed_status_tables(md: MetaData) -> tuple[Table, Table]:
    """``feed_status`` (one row per feed, written by the service) and
    ``service_heartbeat`` (one row per running service)."""
    status = Table(
        "feed_status",
        md,
        Column("feed_id", Text, ForeignKey("feeds.feed_id"), primary_key=True),
        Column("state", Text, nullable=False),
        _utc("last_reading_at", nullable=True),
        Column("last_value", NanFloat()),
        Column("source", Text),
        Column("unit", Text),
        Column("interval_s", Double),
        Column("learning_have", Integer),
        Column("learning_need", Integer),
        _utc("updated_at"),
    )
    beat = Table(
        "service_heartbeat",
        md,
        Column("service", Text, primary_key=True),
        _utc("started_at"),
        _utc("beat_at"),
        Column("beat_interval_s", Double, nullable=False),
        Column("pid", Integer, nullable=False),
        Column("version", Text, nullable=False),
    )
    return status, beat


def _service_marks_table(md: MetaData) -> Table:
    """``service_marks``: one named integer per row (e.g. the last accept note applied)."""
    return Table(
        "service_marks",
        md,
        Column("name", Text, primary_key=True),
        Column("value", BigInteger, nullable=False),
        _utc("updated_at"),
    )


def _evidence_table(md: MetaData) -> Table:
    """``evidence``: one row per episode, the slots around it packed (see :mod:`.evidence`)."""
    return Table(
        "evidence",
        md,
        Column("feed_id", Text, ForeignKey("feeds.feed_id"), nullable=False),
        Column("rule", Text, nullable=False),
        _utc("start_at"),
        _utc("end_at", nullable=True),
        Column("complete", Integer, nullable=False),
        Column("slots", Integer, nullable=False),
        Column("omitted_slots", Integer, nullable=False),
        Column("base_epoch_s", Double, nullable=False),
        Column("data", LargeBinary, nullable=False),
        _utc("updated_at"),
        PrimaryKeyConstraint("start_at", "feed_id", "rule"),
        CheckConstraint("complete IN (0, 1)", name="complete_flag"),
        CheckConstraint("slots >= 0", name="slots_nonnegative"),
    )


#: The tables at the current schema version, for the writer and the queries.
metadata = build_metadata()
schema_version_table = metadata.tables["leadline_schema_version"]
feeds = metadata.tables["feeds"]
models = metadata.tables["models"]
events = metadata.tables["events"]
event_notes = metadata.tables["event_notes"]
checkpoints = metadata.tables["checkpoints"]
source_offsets = metadata.tables["source_offsets"]
reject_counts = metadata.tables["reject_counts"]
reject_samples = metadata.tables["reject_samples"]
evidence = metadata.tables["evidence"]
feed_status = metadata.tables["feed_status"]
service_heartbeat = metadata.tables["service_heartbeat"]
service_marks = metadata.tables["service_marks"]

journal_feeds = metadata.tables["journal_feeds"]
journal = metadata.tables["journal"]

#: Every table name the store owns (to recognise a foreign or damaged schema).
TABLE_NAMES = frozenset(metadata.tables)


def start_hour_of(epoch_s: float) -> int:
    """Whole hours since 1970-01-01T00:00Z: ``floor(epoch_s / 3600)``."""
    return int(epoch_s // 3600)
