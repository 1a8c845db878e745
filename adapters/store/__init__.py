"""The event store: SQLite by default, PostgreSQL by URL, nothing lost.

::

    from leadline.adapters.store import open_store
    store = open_store("sqlite:///leadline.db")
    store.stage_event(ev); store.stage_offset(off)
    if store.flush_due():
        store.flush()          # one transaction: events + checkpoints + offsets

Modules: :mod:`.coltypes` (UTC, NaN and unsigned column types), :mod:`.schema`
(tables and indexes), :mod:`.connect` (engines, PRAGMAs, BEGIN IMMEDIATE,
error translation), :mod:`.migrations` (schema versions), :mod:`.writer`
(staging and the batched upsert), :mod:`.queries` (review queries),
:mod:`.records` (returned records), :mod:`.eventstore` (the facade).
"""

from .eventstore import EventStore, open_store, upgrade_store
from .records import FeedCount, Feed, HourCount, ModelRecord, Note, RejectCount, StoredEvent
from .schema import SCHEMA_VERSION

__all__ = [
    "EventStore",
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
