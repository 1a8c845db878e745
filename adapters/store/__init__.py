"""The event store: SQLite by default, PostgreSQL by URL, nothing lost.

::

    from leadline.adapters.store import open_store
    store = open_store("sqlite:///leadline.db")
    store.stage_event(ev); store.stage_offset(off)
    if store.flush_due():
        store.flush()          # one transaction: events + checkpoints + offsets

Two sides: :class:`EventWriter` is what the service writes (its
:class:`~leadline.adapters.ports.EventSink`), :class:`EventQueries` what the
review commands read and the notes they append. :class:`EventStore`, from
:func:`open_store`, is both.

Modules: :mod:`.coltypes` (UTC, NaN and unsigned column types), :mod:`.schema`
(tables and indexes), :mod:`.dialects` (everything SQLite- or
PostgreSQL-specific: PRAGMAs, BEGIN IMMEDIATE, upserts, triggers, locks),
:mod:`.connect` (engines, transactions, error translation),
:mod:`.migrations` (schema versions), :mod:`.writer` (staging and the
batched upsert), :mod:`.queries` (review queries), :mod:`.records`
(returned records), :mod:`.handle` (what both sides share),
:mod:`.eventstore` (the write side and the store), :mod:`.reads` (the
review side).
"""

from .eventstore import EventStore, EventWriter, open_store, upgrade_store
from .reads import EventQueries
from .records import FeedCount, Feed, HourCount, ModelRecord, Note, RejectCount, StoredEvent
from .schema import SCHEMA_VERSION

__all__ = [
    "EventQueries",
    "EventStore",
    "EventWriter",
    "Feed",
    "FeedCount",
    "HourCount",
    "ModelRecord",
    "Note",
    "RejectCount",
    "SCHEMA_VERSION",
    "StoredEvent",
    "open_store",
    "upgrade_store",
]
