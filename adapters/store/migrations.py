"""Schema versions: create a fresh store, refuse a foreign one, upgrade an old one.

The table ``leadline_schema_version`` holds one row per applied version;
the highest is in force. Opening a database

- with none of the store's tables: creates the current schema, stamped
  :data:`~.schema.SCHEMA_VERSION`, in one transaction;
- at the current version: proceeds;
- at an older version: refuses with :class:`SchemaVersionError`, unless
  the caller asked for the upgrade explicitly (:func:`upgrade_store`,
  ``open_store(..., upgrade=True)``): then every step runs in order, each in
  its own transaction together with its version row;
- at a newer version, or with store tables but no version table: refuses
  with :class:`SchemaVersionError`, since writing could corrupt it.

Every step is one function in :data:`UPGRADES`. DDL is transactional on both
SQLite (here the driver's implicit commits are switched off, see
:mod:`.dialects`) and PostgreSQL, so a crash mid-step leaves the old version.
"""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Callable

from sqlalchemy import BigInteger, Connection, Engine, bindparam, func, inspect, select, update

from leadline.detector.errors import SchemaVersionError

from . import schema
from .connect import read_transaction, safe_url, write_transaction
from .dialects import lock_schema as _lock_schema, replace_note_kinds

_BACKFILL_BATCH = 5000


def _upgrade_1_to_2(conn: Connection) -> None:
    """Add ``events.start_hour`` (hours since the epoch), backfill it, index it."""
    type_sql = conn.dialect.type_compiler_instance.process(BigInteger())
    conn.exec_driver_sql(f"ALTER TABLE events ADD COLUMN start_hour {type_sql}")
    ev = schema.events  # the current table has start_hour
    last_id = 0
    while True:
        rows = conn.execute(
            select(ev.c.id, ev.c.start_at).where(ev.c.id > last_id).order_by(ev.c.id).limit(_BACKFILL_BATCH)
        ).all()
        if not rows:
            break
        conn.execute(
            update(ev).where(ev.c.id == bindparam("b_id")).values(start_hour=bindparam("b_hour")),
            [{"b_id": r.id, "b_hour": schema.start_hour_of(r.start_at.timestamp())} for r in rows],
        )
        last_id = rows[-1].id
    for index in ev.indexes:
        if index.name == "ix_events_hour":
            index.create(conn)


def _upgrade_2_to_3(conn: Connection) -> None:
    """Add the ``evidence`` table (readings and forecasts around each episode)."""
    schema.build_metadata(3).tables["evidence"].create(conn)


def _add_feed_status(conn: Connection) -> None:
    """Add ``feed_status`` and ``service_heartbeat`` (what ``leadline status`` shows of a running service)."""
    md = schema.build_metadata(4)
    md.tables["feed_status"].create(conn)
    md.tables["service_heartbeat"].create(conn)


def _add_incidents_and_accept_notes(conn: Connection) -> None:
    """Add ``events.incident_start`` (NULL for the old events: each one an incident of its own),
    the note kind ``accept`` and the ``service_marks`` table.

    The note kinds are a CHECK constraint, replaced by
    :func:`~.dialects.replace_note_kinds`.
    """
    new = schema.build_metadata(5)
    type_sql = conn.dialect.type_compiler_instance.process(new.tables["events"].c.incident_start.type)
    conn.exec_driver_sql(f"ALTER TABLE events ADD COLUMN incident_start {type_sql}")
    replace_note_kinds(conn, new.tables["event_notes"], schema.NOTE_KINDS)
    new.tables["service_marks"].create(conn)


def _add_journal(conn: Connection) -> None:
    """Add ``journal_feeds`` and ``journal`` (the journal of accepted readings and the snapshots)."""
    md = schema.build_metadata(6)
    md.tables["journal_feeds"].create(conn)
    md.tables["journal"].create(conn)


#: ``UPGRADES[v]`` turns a version ``v - 1`` database into version ``v``.
UPGRADES: dict[int, tuple[str, Callable[[Connection], None]]] = {
    2: ("events.start_hour and ix_events_hour for alarm counts per hour", _upgrade_1_to_2),
    3: ("evidence: readings and forecasts around each alarm episode", _upgrade_2_to_3),
    4: ("feed_status and service_heartbeat: each feed's state and the service's liveness", _add_feed_status),
    5: ("events.incident_start, the accept note kind and service_marks", _add_incidents_and_accept_notes),
    6: ("journal of accepted readings and per-feed snapshots", _add_journal),
}

_DESCRIPTIONS = {1: "first schema"} | {v: d for v, (d, _) in UPGRADES.items()}


def read_version(conn: Connection) -> int | None:
    """The schema version in force, or None for a database without store tables.

    Raises
    ------
    SchemaVersionError
        Store tables without a version table (not made by leadline, or
        damaged), or an empty version table.
    """
    names = set(inspect(conn).get_table_names())
    ours = names & schema.TABLE_NAMES
    if schema.schema_version_table.name not in names:
        if ours:
            raise SchemaVersionError(
                f"the database has tables named like the event store's ({', '.join(sorted(ours))}) "
                "but no leadline_schema_version table: it was not created by leadline or is "
                "damaged; refusing to use it"
            )
        return None
    version = conn.execute(select(func.max(schema.schema_version_table.c.version))).scalar()
    if version is None:
        raise SchemaVersionError("leadline_schema_version is empty: the schema version is unknown; refusing to use it")
    return int(version)


def _stamp(conn: Connection, version: int) -> None:
    conn.execute(
        schema.schema_version_table.insert().values(
            version=version, applied_at=datetime.now(timezone.utc), description=_DESCRIPTIONS[version]
        )
    )


def create_schema(conn: Connection, version: int = schema.SCHEMA_VERSION) -> None:
    """Create every table at ``version`` and stamp it (versions 1.. for tests
    of upgrades; the store itself always creates the current version)."""
    schema.build_metadata(version).create_all(conn)
    for v in range(1, version + 1):
        _stamp(conn, v)


def _newer_message(found: int, url: str) -> str:
    return (
        f"the database at {url} has schema version {found}, newer than version "
        f"{schema.SCHEMA_VERSION} that this build of leadline knows; refusing to open it. "
        "Use the leadline release that wrote it, or a newer one"
    )


def _older_message(found: int, url: str) -> str:
    return (
        f"the database at {url} has schema version {found}, older than version "
        f"{schema.SCHEMA_VERSION} that this build uses; it must be upgraded explicitly "
        "(back it up first, then run the store upgrade: "
        "leadline.adapters.store.upgrade_store(url) or open_store(url, upgrade=True))"
    )


def ensure_schema(engine: Engine, *, upgrade: bool = False) -> int:
    """Check (and if needed create or upgrade) the schema; return the version in force.

    Parameters
    ----------
    engine : sqlalchemy.Engine
    upgrade : bool
        Run the upgrade steps on an older database instead of refusing.

    Raises
    ------
    SchemaVersionError
        Newer, unknown or (without ``upgrade``) older schema.
    StoreError
        The database could not be read or written.
    """
    url = safe_url(engine.url)
    with read_transaction(engine, "reading the schema version") as conn:
        found = read_version(conn)
    if found == schema.SCHEMA_VERSION:
        return found
    if found is not None and found > schema.SCHEMA_VERSION:
        raise SchemaVersionError(_newer_message(found, url))
    if found is not None and not upgrade:
        raise SchemaVersionError(_older_message(found, url))

    with write_transaction(engine, "creating the schema") as conn:
        _lock_schema(conn)
        found = read_version(conn)  # again, under the lock
        if found is None:
            create_schema(conn)
            return schema.SCHEMA_VERSION
    if found > schema.SCHEMA_VERSION:
        raise SchemaVersionError(_newer_message(found, url))
    if found < schema.SCHEMA_VERSION and not upgrade:
        raise SchemaVersionError(_older_message(found, url))
    for target in range(found + 1, schema.SCHEMA_VERSION + 1):
        with write_transaction(engine, f"upgrading the schema to version {target}") as conn:
            _lock_schema(conn)
            if read_version(conn) != target - 1:
                continue  # another process did this step meanwhile
            UPGRADES[target][1](conn)
            _stamp(conn, target)
    return schema.SCHEMA_VERSION
