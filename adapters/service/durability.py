"""One consistent cut: the journal of accepted readings, snapshots, recovery.

The service journals every reading it hands to the engine (feed, reading
time, value; :mod:`leadline.adapters.store.journal`) in the store's flush,
the SAME transaction as the events and the CSV offsets, before the MQTT
acknowledgements. Every ``snapshot_interval_s`` (or after
``snapshot_every_readings`` journaled readings) it stages a snapshot of the
watching feeds that have no fit in flight and new readings since their last
snapshot (at most ``snapshot_max_feeds`` a round, the longest unsnapshotted
first; every one at shutdown), each with the journal position it covers. At start, :meth:`Durability.recover` restores the snapshots and
hands back the journal rows after each feed's position, which the service
replays through the engine: events upsert on their key, so a replay of
what was already committed changes nothing. A feed still learning or
fitting has no snapshot, and its journal is kept from its first reading, so
the replay rebuilds its learning window instead of throwing it away.

Determinism of refits
---------------------
A fit runs in the background and takes wall-clock time; if its model went
into the stream whenever it happened to finish, a replay after a crash
would score different readings with the new model than the uninterrupted
run did. So every fit is installed at a point fixed in reading time: just
before the first reading of its feed at or after the request's last slot
plus ``refit_install_delay_slots`` intervals; a fit not done by then is
waited for (the loop blocks on it). A run and its replay therefore install
at the same reading. Snapshots are taken only of feeds with no fit in
flight, so a restored feed requests its next fit at the same slot as the
run it continues.

Duplicates: an MQTT message committed but not yet acknowledged when the
service died comes again, and a QoS 1 publisher that lost its broker may
send a message twice, the copy much later. A reading is dropped as a repeat
(and acknowledged with its batch) when its (feed, time) was journaled in
this process or is among the journal's kept rows (truncation lags one
snapshot), or when its time is not after the latest reading time the feed
had journaled before this start (``journal_feeds.last_t``). The last rule
also drops a reading that is merely late by more than the outage; the grid
would have refused it as out of order anyway, so no model or event differs,
but it is counted as a duplicate, not journaled.
"""

from __future__ import annotations

import logging
import time
from collections import deque
from collections.abc import Iterator
from datetime import datetime, timezone
from typing import Any

from leadline.detector.errors import ConfigError, StateFormatError
from leadline.detector.readings import Reading

logger = logging.getLogger("leadline.service")

#: Journaled reading times remembered per feed to recognise a message that comes again.
RECENT_PER_FEED = 20_000


class Durability:
    """The journal, the snapshots and the recovery of one service.

    Parameters
    ----------
    store : EventWriter
        A store with ``open_journal``, ``stage_reading`` and ``stage_snapshot``.
    snapshot_interval_s : float
        Snapshots of every ready feed at least this often (wall clock).
    snapshot_every_readings : int
        ... or as soon as this many readings were journaled since the last.
    snapshot_max_feeds : int
        Feeds snapshotted per round at most: those whose own last snapshot
        lies furthest back in the journal first. A feed with none is
        skipped (its snapshot would be the same state). At 10,000 busy feeds
        a round of every feed wrote about 140 MB and held the loop; spread
        over rounds, each feed is still snapshotted every few rounds, and a
        restart replays at most that much more of its journal.
    """

    def __init__(self, store: Any, *, snapshot_interval_s: float = 30.0,
                 snapshot_every_readings: int = 100_000, snapshot_max_feeds: int = 2_000) -> None:
        if not snapshot_interval_s > 0:
            raise ConfigError(f"snapshot_interval_s must be > 0, got {snapshot_interval_s}")
        if snapshot_every_readings < 1:
            raise ConfigError(f"snapshot_every_readings must be >= 1, got {snapshot_every_readings}")
        self.store = store
        self.snapshot_interval_s = float(snapshot_interval_s)
        self.snapshot_every_readings = int(snapshot_every_readings)
        if snapshot_max_feeds < 1:
            raise ConfigError(f"snapshot_max_feeds must be >= 1, got {snapshot_max_feeds}")
        self.snapshot_max_feeds = int(snapshot_max_feeds)
        #: feed -> the journal position its last staged snapshot covers
        self.snapshot_seq: dict[str, int] = {}
        self.last_seq: dict[str, int] = {}
        self._recent: dict[str, tuple[set[float], deque[float]]] = {}
        self._since_snapshot = 0
        self._last_snapshot = time.monotonic()
        self.duplicates = 0
        self._before_start: dict[str, float] = {}
        self.replayed = 0

    def _remember(self, feed_id: str, epoch_s: float) -> None:
        entry = self._recent.get(feed_id)
        if entry is None:
            entry = self._recent[feed_id] = (set(), deque())
        seen, order = entry
        seen.add(epoch_s)
        order.append(epoch_s)
        if len(order) > RECENT_PER_FEED:
            seen.discard(order.popleft())

    def recover(self, engine: Any) -> Iterator[Reading]:
        """Restore every snapshot into ``engine``; yield the journal's readings to replay, in journal order."""
        state = self.store.open_journal()
        self._before_start = dict(state.last_t)
        positions: dict[str, int] = {}
        for feed_id, (seq, version, blob) in state.snapshots.items():
            try:
                engine.restore(feed_id, blob, version)
            except (StateFormatError, ConfigError) as exc:
                logger.warning(f"snapshot not used; the feed's journal is replayed from its start feed={feed_id} "
                               f"error={exc}")
                continue
            positions[feed_id] = seq
            self.last_seq[feed_id] = seq
            self.snapshot_seq[feed_id] = seq
            logger.info(f"checkpoint restored feed={feed_id} model_version={version} journal_seq={seq}")
        # A feed of a store from before the journal: its last checkpoint, as without a journal.
        for feed_id, (blob, version) in self.store.load_checkpoints().items():
            if feed_id in state.feed_keys:
                continue
            try:
                engine.restore(feed_id, blob, version)
            except (StateFormatError, ConfigError) as exc:
                logger.warning(f"checkpoint not used; the feed learns again feed={feed_id} error={exc}")
            else:
                logger.info(f"checkpoint restored feed={feed_id} model_version={version}")
        for seq, feed_id, epoch_s, value in state.rows:
            self._remember(feed_id, epoch_s)
            self.last_seq[feed_id] = max(seq, self.last_seq.get(feed_id, 0))
            if seq <= positions.get(feed_id, 0):
                continue
            self.replayed += 1
            yield Reading(feed_id, datetime.fromtimestamp(epoch_s, tz=timezone.utc), value, origin=("journal", seq))

    def seen(self, reading: Reading) -> bool:
        """True for a reading already journaled (a message that came again); it is dropped."""
        epoch_s = reading.timestamp.timestamp()
        entry = self._recent.get(reading.feed_id)
        before = self._before_start.get(reading.feed_id)
        if (entry is not None and epoch_s in entry[0]) or (before is not None and epoch_s <= before):
            self.duplicates += 1
            return True
        return False

    def journal(self, reading: Reading) -> None:
        """Stage one accepted reading in the journal (it commits with the next flush)."""
        epoch_s = reading.timestamp.timestamp()
        self.last_seq[reading.feed_id] = self.store.stage_reading(reading.feed_id, epoch_s, float(reading.value))
        self._remember(reading.feed_id, epoch_s)
        self._since_snapshot += 1

    def snapshot_due(self, now_monotonic: float) -> bool:
        return (self._since_snapshot >= self.snapshot_every_readings
                or now_monotonic - self._last_snapshot >= self.snapshot_interval_s)

    def stage_snapshots(self, engine: Any, all_feeds: bool = False, force: bool = False) -> int:
        """Stage snapshots of the feeds that watch with no fit in flight and have new readings; return how many.

        At most ``snapshot_max_feeds``, those whose own last snapshot lies
        furthest back in the journal first (``all_feeds`` lifts the cap, at shutdown;
        ``force`` also takes feeds with no new reading, whose state an operator's
        accept changed).
        """
        due = []
        for feed_id in engine.feed_ids:
            seq = self.last_seq.get(feed_id)
            if seq is None or (seq == self.snapshot_seq.get(feed_id) and not force) \
                    or not engine.snapshot_ready(feed_id):
                continue
            due.append((seq - self.snapshot_seq.get(feed_id, -1), feed_id, seq))
        if not all_feeds and len(due) > self.snapshot_max_feeds:
            due.sort(key=lambda item: (-item[0], item[1]))
            del due[self.snapshot_max_feeds:]
        for _, feed_id, seq in due:
            self.store.stage_snapshot(feed_id, seq, engine.checkpoint(feed_id), engine.model_version_of(feed_id))
            self.snapshot_seq[feed_id] = seq
        n = len(due)
        self._since_snapshot = 0
        self._last_snapshot = time.monotonic()
        return n
