"""The service loop: sources -> engine -> store (and the alarm publisher).

One :class:`Service` owns the running parts and does, until it is asked to stop:

1. poll each source for readings (CSV followers, MQTT subscriptions);
2. feed every reading to the engine, which returns events, state changes
   and refit requests (the engine does no I/O);
3. stage the events, and the sources' durable marks (CSV byte offsets) for
   the readings just processed, in the store;
4. commit at most every ``flush_interval_s`` (or when ``max_staged_events``
   pile up): events and offsets go in ONE transaction, and only after the
   commit returned are the sources acknowledged (MQTT PUBACK) and the
   events published. So an offset or an ack never runs ahead of the
   committed events;
5. run refits in a background process pool (at most one worker per core);
   a finished fit is recorded as a new model version with its reason and
   swapped in by the engine at once;
6. save each feed's checkpoint (stream state and model version) on a timer,
   after each new model and at shutdown, so a restart resumes without a
   learning phase;
7. log one line per event, connection change and refit, one line per
   source and reject reason per minute (exact reject counts go to the
   store, :mod:`.reject_summary`), and a summary line every
   ``summary_interval_s`` (readings/s, queue depth, alarms active) with a
   ``store time`` line (the flushes' time per part, also at shutdown;
   :mod:`leadline.adapters.store.timing`);
8. when the store fails, retry the flush with exponential backoff
   (``store_retry_base_s`` doubling up to ``store_retry_cap_s``, :mod:`.backoff`),
   logging one line when it goes down and one when it is back; meanwhile
   sources are no longer polled once ``max_pending_readings`` wait for the
   commit;
9. tell systemd (``Type=notify``, :mod:`.sd_notify`): READY=1 once the
   sources are started, WATCHDOG=1 from the loop, the summary as STATUS=,
   STOPPING=1 at shutdown;
10. stage, with each commit, the status of every feed that changed since the
    last one (state, last reading, source, learning progress) and, every
    ``heartbeat_interval_s``, a heartbeat (start time, beat, pid, version),
    which ``leadline status`` reads;
11. publish no event of a shelved feed (it is stored all the same): the
    shelving notes are read from the store every ``shelving_refresh_s``.

:meth:`Service.request_stop` (wired to SIGTERM and SIGINT by ``leadline run``)
stops the sources, drains what they still hold, flushes events and
checkpoints, and :meth:`Service.run` returns 0.

Notes
-----
With a :class:`~.durability.Durability` (``[store] journal``, the default of
``leadline run``) every reading is journaled in the same transaction as
the events and the offsets, and a restart replays the journal after each
feed's snapshot, so no committed reading is skipped by the model; fits are
installed at a fixed point in reading time so the replay matches the run
(:mod:`.durability`). Without one, readings processed after the last
checkpoint are predict-only gaps after a crash. Either way the store's key
(feed, rule, start) absorbs replayed events.
"""

from __future__ import annotations

import logging
import os
import threading
import time
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ProcessPoolExecutor
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any

from leadline.detector.errors import LeadlineError, StoreError
from leadline.detector.events import AlarmEvent
from leadline.detector.evidence import EvidenceRecorder
from leadline.detector.readings import Reading

from ..ports import AlarmPublisher, EventSink, Source

if TYPE_CHECKING:
    from leadline.detector.engine import Engine

from .accepts import AcceptPoller
from .backoff import Backoff
from .feed_reports import FeedReports
from .log_setup import log_fields  # noqa: F401 (re-exported: other modules log through it)
from .refits import Refits
from .durability import Durability
from .refit_pool import refit_pool
from .reject_summary import RejectSummary, stage_source_rejects

logger = logging.getLogger("leadline.service")


def _utc_now() -> datetime:
    return datetime.now(timezone.utc)



class Service(FeedReports, Refits):
    """Wires sources, the engine, the store and an optional alarm publisher.

    Parameters
    ----------
    engine : leadline.detector.engine.Engine
    store : EventSink
        The store's write side (:class:`~leadline.adapters.ports.EventSink`).
    sources : sequence of Source
    publisher : AlarmPublisher, optional
        Told of each event of a commit, after the commit returned.
    refit : callable, optional
        ``refit(request) -> (FittedModel, thresholds)``; default the engine's
        ``run_refit_with_thresholds``, so the limits are computed in the worker.
    refit_workers : int
        Background processes for refits (capped at the number of cores);
        0 runs refits inline, in this process (replays and tests).
    checkpoint_interval_s, tick_interval_s, summary_interval_s : float
    batch_size : int
        Readings taken from one source per poll.
    clock : callable or "readings"
        Time for the engine's ticks (the stale rule): the wall clock by
        default; ``"readings"`` follows the newest reading's time, for a
        replay of history or the demo.
    store_retry_base_s, store_retry_cap_s : float
        Backoff of failed flushes: the first wait, and the longest.
    max_pending_readings : int
        While the store is down, stop polling once this many readings wait
        for a commit (memory stays bounded; MQTT brokers keep the rest).
    notifier : leadline.adapters.service.sd_notify.Notifier, optional
        The link to systemd; None sends nothing.
    reject_log_interval_s : float
        At most one reject log line per source and reason this often.
    heartbeat_interval_s : float
        How often the service's heartbeat is staged (``leadline status``
        takes a service as stopped after a few missed beats).
    shelving_refresh_s : float
        How often the shelved feeds are read again from the store.
    service_name : str
        The key of this service's heartbeat row.
    metadata : callable, optional
        ``metadata(feed_id) -> dict`` with the configured ``unit`` (and
        ``description``, ``site``, ``tag``, ``timezone``): the unit a feed
        starts with. A source may report units (``take_units()``, SenML
        ``u``); a unit that differs from the one known is a ``unit_change``
        event (warning, opened and closed at once).
    accept_poll_interval_s : float
        How often the store is asked for new ``accept`` notes (:mod:`.accepts`).
    durability : leadline.adapters.service.durability.Durability, optional
        Journal every reading, snapshot the feeds, and recover from both at
        start (:meth:`run`); None keeps only the checkpoints.
    refit_install_delay_slots : int, optional
        Install each fit at the first reading of its feed at or after the
        request's last slot + this many intervals, waiting for it if needed
        (deterministic, see :mod:`.durability`); None installs a fit as soon
        as it is done.
    """

    def __init__(self, *, engine: Engine, store: EventSink, sources: Sequence[Source],
                 publisher: AlarmPublisher | None = None,
                 refit: Callable[[Any], Any] | None = None, refit_workers: int = 1,
                 checkpoint_interval_s: float = 30.0, tick_interval_s: float = 1.0,
                 summary_interval_s: float = 60.0, batch_size: int = 2000,
                 clock: Callable[[], datetime] | str = _utc_now, store_retry_base_s: float = 1.0,
                 store_retry_cap_s: float = 60.0, max_pending_readings: int = 200_000, notifier: Any = None,
                 reject_log_interval_s: float = 60.0, heartbeat_interval_s: float = 5.0,
                 shelving_refresh_s: float = 5.0, service_name: str = "leadline",
                 metadata: Callable[[str], dict[str, Any]] | None = None,
                 accept_poll_interval_s: float = 5.0, durability: Durability | None = None,
                 refit_install_delay_slots: int | None = None) -> None:
        from leadline.detector.engine import run_refit_with_thresholds

        self.engine = engine
        #: The readings and forecasts around each episode, staged with the events.
        self.evidence = EvidenceRecorder()
        self.store = store
        self.sources = list(sources)
        self.publisher = publisher
        self.refit = refit or run_refit_with_thresholds
        self.refit_workers = max(0, min(int(refit_workers), os.cpu_count() or 1))
        self.checkpoint_interval_s = checkpoint_interval_s
        self.tick_interval_s = tick_interval_s
        self.summary_interval_s = summary_interval_s
        self.batch_size = batch_size
        self._latest_reading: datetime | None = None
        if clock == "readings":
            self.clock = self._reading_clock
        elif callable(clock):
            self.clock = clock
        else:
            raise ValueError(f"clock must be a callable or 'readings', got {clock!r}")
        self._stop = threading.Event()
        self._pool: ProcessPoolExecutor | None = None
        self._fits: dict[Future, Any] = {}
        self._fits_of: dict[str, list[Future]] = {}  # the fits in flight by feed, in request order
        self._pending_acks: list[tuple[Source, list[Reading]]] = []
        self._to_publish: list[AlarmEvent] = []
        self._last_commit = time.monotonic()
        self._last_checkpoint = time.monotonic()
        self._last_tick = 0.0
        self._last_summary = time.monotonic()
        self._readings_since_summary = 0
        self.readings_total = 0
        self.events_total = 0
        self.refits_total = 0
        self.rejects_total = 0
        self.store_backoff = Backoff(store_retry_base_s, store_retry_cap_s)
        self.max_pending_readings = int(max_pending_readings)
        self._pending_readings = 0
        self.notifier = notifier
        self.reject_summary = RejectSummary(reject_log_interval_s)
        self.heartbeat_interval_s = float(heartbeat_interval_s)
        self.shelving_refresh_s = float(shelving_refresh_s)
        self.service_name = service_name
        self.started_at = _utc_now()
        self._last_beat = float("-inf")
        self._last_shelving_read = float("-inf")
        self._shelved: dict[str, datetime] = {}
        # status rows: feeds whose state changed (next commit), feeds with readings only (status_interval_s)
        self._changed_feeds, self._read_feeds, self._last_status = set(), set(), 0.0
        #: The source name and the unit each feed was last seen with.
        self.feed_sources: dict[str, str] = {}
        self.feed_units: dict[str, str] = {}
        self.events_withheld = 0
        self.metadata = metadata
        #: Called with the service from each loop turn (``run --replay`` shows progress with it; it throttles).
        self.progress: Callable[[Service], None] | None = None
        #: The operators' accept notes, applied to the engine (:mod:`.accepts`).
        self.accepts = AcceptPoller(store, accept_poll_interval_s)
        #: The journal and snapshots (:mod:`.durability`); None: checkpoints only.
        self.durability = durability
        self.refit_install_delay_slots = refit_install_delay_slots
        self._install_at: dict[Future, float] = {}

    def _reading_clock(self) -> datetime:
        return self._latest_reading or datetime(1970, 1, 1, tzinfo=timezone.utc)

    # ---------------------------------------------------------------- control
    def request_stop(self) -> None:
        """Ask :meth:`run` to stop, drain, flush and return (safe from a signal handler)."""
        self._stop.set()

    @property
    def stopping(self) -> bool:
        return self._stop.is_set()

    @property
    def refits_running(self) -> int:
        """Fits submitted and not yet installed."""
        return len(self._fits)

    def run(self, until_idle: Callable[[], bool] | None = None) -> int:
        """Run until :meth:`request_stop` (or ``until_idle()`` returns True); return 0.

        Raises
        ------
        LeadlineError
            When the store fails for good; what was committed stays committed.
        """
        if self.refit_workers > 0:
            # One BLAS thread per worker: the pool already uses the cores, and
            # nested BLAS threads made each fit several times slower here.
            for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
                os.environ.setdefault(name, "1")
            self._pool = refit_pool(self.refit_workers)  # workers die with the service (:mod:`.refit_pool`)
        if self.durability is not None:
            self._recover()
        for source in self.sources:
            source.start()
            logger.info(log_fields("source started", source=source.name, kind=type(source).__name__))
        if self.notifier is not None:
            self.notifier.ready(f"running; sources: {len(self.sources)}")
        try:
            while not self._stop.is_set():
                busy = self._poll_once(timeout_s=0.0)
                if not busy:
                    busy = self._poll_once(timeout_s=0.05)
                self._collect_fits(block=False)
                self._housekeeping()
                if until_idle is not None and not busy and self._fits and self.refit_install_delay_slots is not None:
                    self._collect_fits(block=False, held=True)  # the input has ended: nothing to wait for
                if until_idle is not None and not busy and not self._fits and until_idle():
                    break
            self._shutdown()
        except BaseException:
            # Keep what was already staged; nothing is acknowledged past it.
            try:
                self._commit(force=True)
            except Exception:  # noqa: BLE001 - the original error is the one to report
                logger.exception("final commit after a failure failed")
            raise
        finally:
            if self._pool is not None:
                self._pool.shutdown(wait=False, cancel_futures=True)
        return 0

    # ------------------------------------------------------------------ steps
    def _poll_once(self, timeout_s: float) -> bool:
        busy = False
        if self.store_backoff.down and self._pending_readings >= self.max_pending_readings:
            self._stop.wait(timeout_s)  # the store is down: hold the input until it is back
            return False
        for source in self.sources:
            readings = source.poll(self.batch_size, timeout_s / max(1, len(self.sources)))
            if readings:
                busy = True
                self._process(source, readings)
            else:
                # Rows that were only rejected still move a file's mark forward.
                for mark in source.durable_marks(readings):
                    self.store.stage_offset(mark)
            self.rejects_total += stage_source_rejects(self.store, source, self.reject_summary)
        return busy

    def _recover(self) -> None:
        """Restore the snapshots and replay the journal after them (:mod:`.durability`)."""
        n = 0
        for reading in self.durability.recover(self.engine):
            self._take(reading)
            n += 1
        if n or self.durability.last_seq:
            logger.info(log_fields("recovered from the journal", feeds=len(self.durability.last_seq), replayed=n))

    def _take(self, reading: Reading) -> None:
        """One reading through the engine, after any fit due to be installed before it."""
        if self._fits and self.refit_install_delay_slots is not None:
            self._install_due(reading.feed_id, reading.timestamp.timestamp())
        self._handle(self.engine.process(reading), reading)
        if self._latest_reading is None or reading.timestamp > self._latest_reading:
            self._latest_reading = reading.timestamp

    def _process(self, source: Source, readings: list[Reading]) -> None:
        durability = self.durability
        for reading in readings:
            if durability is not None:
                if durability.seen(reading):
                    continue
                durability.journal(reading)
            if reading.feed_id not in self.feed_sources and self.metadata is not None:
                unit = self.metadata(reading.feed_id).get("unit")
                if unit:
                    self.feed_units.setdefault(reading.feed_id, unit)
            self._take(reading)
            self._read_feeds.add(reading.feed_id)
            self.feed_sources[reading.feed_id] = source.name
        take_units = getattr(source, "take_units", None)  # optional: sources that carry units (SenML "u")
        if callable(take_units):
            for feed_id, unit in take_units().items():
                self._note_unit(feed_id, unit, self._latest_reading or readings[-1].timestamp)
        for mark in source.durable_marks(readings):
            self.store.stage_offset(mark)
        self._pending_acks.append((source, readings))
        self._pending_readings += len(readings)
        self.readings_total += len(readings)
        self._readings_since_summary += len(readings)

    def _handle(self, out: Any, reading: Any = None) -> None:
        for record in self.evidence.observe(out, reading):
            self.store.stage_evidence(record)
        for event in out.events:
            self.store.stage_event(event)
            self._to_publish.append(event)
            self.events_total += 1
            logger.info(log_fields("event", feed=event.feed_id, rule=event.rule, severity=event.severity,
                                   start=event.start.isoformat(), end=event.end.isoformat() if event.end else "-",
                                   peak_abs_z=event.peak_abs_z, model_version=event.model_version,
                                   detail=event.detail))
        for change in out.state_changes:
            self._changed_feeds.add(change.feed_id)
            logger.info(log_fields("feed state", feed=change.feed_id, old=change.old, new=change.new,
                                   detail=change.detail))
        for request in out.refit_requests:
            self._start_fit(request)


    def _housekeeping(self) -> None:
        now = time.monotonic()
        if now - self._last_tick >= self.tick_interval_s:
            self._last_tick = now
            self._handle(self.engine.tick(self.clock()))
        if self.accepts.due(now):
            self._apply_accepts(now)
        if self.durability is not None and self.durability.snapshot_due(now):
            self.durability.stage_snapshots(self.engine)
            self._commit()
        if now - self._last_checkpoint >= self.checkpoint_interval_s:
            self._stage_checkpoints(periodic=True)
            self._commit()
        elif self.store.flush_due(now) or (self._pending_acks and now - self._last_commit >= 1.0):
            self._commit()
        if now - self._last_summary >= self.summary_interval_s:
            self._summary(now)
        self.reject_summary.tick()
        self._beat(now)
        if self.notifier is not None:
            self.notifier.heartbeat()
        if self.progress is not None:
            self.progress(self)

    def _apply_accepts(self, now: float) -> None:
        """New accept notes to the engine; the checkpoints staged with the mark, committed at once."""
        try:
            applied = self.accepts.poll(self.engine, now, self._handle)
        except StoreError as exc:
            logger.warning(log_fields("accept notes not read", error=str(exc)))
            return
        if applied:
            if self.durability is not None:  # the accepted state is what a restart must resume
                self.durability.stage_snapshots(self.engine, all_feeds=True, force=True)
            self._stage_checkpoints()
            self._commit()

    def _stage_checkpoints(self, periodic: bool = False) -> None:
        # with the journal, its snapshots are what a restart resumes from: the checkpoint table
        # is written at shutdown and after accepts only (at 10,000 feeds a round cost seconds)
        if not (periodic and self.durability is not None):
            for feed_id, (state, version) in self.engine.checkpoints().items():
                self.store.stage_checkpoint(feed_id, state, version)
        for record in self.evidence.partial():  # episodes still open, so a review sees them
            self.store.stage_evidence(record)
        self._last_checkpoint = time.monotonic()

    def _commit(self, force: bool = False) -> None:
        """Flush the store; then acknowledge the sources and publish, in that order.

        After a failure the next try waits for the backoff, unless ``force``.
        """
        backoff = self.store_backoff
        if not (force or backoff.ready()):
            return
        self._stage_feed_status(force)
        try:
            self.store.flush()
        except StoreError as exc:
            # Everything stays staged; a later commit retries. Nothing is acked meanwhile.
            if backoff.failed():
                logger.error(log_fields("store down; flushes retried with backoff", error=str(exc),
                                        retry_cap_s=backoff.cap_s))
            return
        outage_s = backoff.succeeded()
        if outage_s is not None:
            logger.warning(log_fields("store back", after_s=round(outage_s, 1)))
        self._last_commit = time.monotonic()
        self._pending_readings = 0
        acks, self._pending_acks = self._pending_acks, []
        for source, readings in acks:
            source.ack(readings)
        events, self._to_publish = self._to_publish, []
        if self.publisher is not None and events:
            try:
                for event in events:
                    if self.shelved(event.feed_id):
                        self.events_withheld += 1  # recorded, not published (ISA-18.2 shelving)
                        logger.debug(log_fields("not published: feed shelved", feed=event.feed_id, rule=event.rule))
                        continue
                    self.publisher.publish(event)
            except LeadlineError as exc:
                logger.warning(log_fields("alarm publishing failed", error=str(exc), events=len(events)))

    def _summary(self, now: float) -> None:
        elapsed = max(now - self._last_summary, 1e-9)
        feeds, active = self.engine.counts()
        depth = 0
        for source in self.sources:
            pending = getattr(source, "pending_messages", 0)
            depth += pending() if callable(pending) else pending
        logger.info(log_fields("summary", readings_per_s=self._readings_since_summary / elapsed, feeds=feeds,
                               queue_depth=depth, alarms_active=active, refits_running=len(self._fits),
                               readings_total=self.readings_total, events_total=self.events_total,
                               rejects_total=self.rejects_total))
        if self.notifier is not None:
            self.notifier.status(f"{self._readings_since_summary / elapsed:.1f} readings/s; {feeds} feeds; "
                                 f"{active} alarms active; store {'down' if self.store_backoff.down else 'up'}")
        self._last_summary = now
        self._readings_since_summary = 0
        self._log_store_time()

    def _log_store_time(self) -> None:
        logger.info(log_fields("store time", **self.store.take_store_time().fields()))

    def _shutdown(self) -> None:
        if self.notifier is not None:
            self.notifier.stopping("draining the sources and flushing")
        for source in self.sources:
            source.stop()
        # Drain: whatever the sources still hold is processed and committed.
        while self._poll_once(timeout_s=0.0):
            pass
        if self.durability is not None:
            self.durability.stage_snapshots(self.engine, all_feeds=True)
        self._stage_checkpoints()
        self._commit(force=True)
        self._log_store_time()
        if self.store_backoff.down:
            logger.error(log_fields("store still down at shutdown; staged work not committed",
                                    readings=self._pending_readings,
                                    detail="MQTT messages stay unacknowledged and come again; CSV files resume "
                                           "from the last committed offset"))
        self.reject_summary.flush()
        for source in self.sources:
            close = getattr(source, "close", None)
            if close is not None:
                close()
        logger.info(log_fields("stopped", readings_total=self.readings_total, events_total=self.events_total,
                               refits=self.refits_total))
