"""The engine: readings and clock ticks in; events, state changes and refit requests out.

The engine is pure: it does no I/O and never reads the clock. Time comes from
the readings' timestamps and from :meth:`Engine.tick`. The live service, a
replay of history and the tests therefore drive it identically. Fits are
not run here. The engine emits a :class:`RefitRequest`, and whoever drives it
runs :func:`run_refit` (in a process pool, or inline) and hands the result
back with :meth:`Engine.install_model`.

Lifecycle of one feed
---------------------
Each feed goes ``learning`` -> ``fitting`` -> ``watching``: readings are
collected until the training window is full, put on a regular grid and
fitted (the initial fit); from then on every slot is scored by the alarm
rules, and the model is refitted on schedule or when its diagnostics
degrade, the old model watching until the new one is installed. A feed
can be checkpointed once it watches and restored after a restart without
learning again. The parts, each in its own module:

:mod:`.feed`
    :class:`~.feed.FeedLifecycle`, the lifecycle of one feed: learning,
    fitting, watching, failed fits, counter feeds, status.
:mod:`.feed_settings`
    :class:`FeedSettings`, how the engine treats one feed, and its validation.
:mod:`.refit`
    :class:`RefitRequest`, :func:`run_refit`, :func:`thresholds_for`,
    :func:`run_refit_with_thresholds`; scheduled and diagnostics refits and
    how a new model takes over; the refit window.
:mod:`.diagnostics`
    The rolling checks of the innovations (variance ratio, Ljung-Box) that
    request a diagnostics refit.
:mod:`.feed_state`
    The checkpoint format of a watched feed.
:mod:`.engine_output`
    :class:`EngineOutput` and :class:`StateChange` (re-exported here).

Use one engine from one thread. Every output (of ``process``, ``tick``,
``install_model`` and ``refit_failed``) may hold events, state changes
and refit requests.
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import datetime
from typing import Any

from .engine_output import EngineOutput, StateChange
from .errors import DataError
from .feed import FeedLifecycle
from .feed_settings import FeedSettings
from .feed_state import feed_checkpoint, feed_from_checkpoint
from .rules.limits import AlarmLimits
from .fitting import FittedModel
from .quiet_step import step_quiet
from .readings import Reading
from .refit import RefitRequest, run_refit, run_refit_with_thresholds, thresholds_for

# Re-exported: the adapters import these names from here.
__all__ = ["Engine", "EngineOutput", "FeedSettings", "RefitRequest", "StateChange", "run_refit",
           "run_refit_with_thresholds", "thresholds_for"]


class Engine:
    """Readings and ticks in; events, state changes and refit requests out (module docstring).

    Parameters
    ----------
    settings_for : callable
        ``settings_for(feed_id) -> FeedSettings``, called once per feed, at
        its first reading or its restore.
    quiet_steps : bool
        Take a quiet reading of a watching feed by :func:`~.quiet_step.step_quiet`
        (the same result at 55-75% of the cost; default); False runs
        every reading through the whole per-reading path (the reference the
        tests compare with).
    """

    def __init__(self, settings_for: Callable[[str], FeedSettings], quiet_steps: bool = True) -> None:
        self._settings_for = settings_for
        self.quiet_steps = quiet_steps
        #: Readings taken by the quiet step (a count for benchmarks and tests).
        self.quiet_readings = 0
        self._feeds: dict[str, FeedLifecycle] = {}
        self._clock: datetime | None = None
        self._queued = EngineOutput()

    def _take_queued(self) -> EngineOutput:
        out, self._queued = self._queued, EngineOutput()
        return out

    def _get(self, feed_id: str) -> FeedLifecycle:
        try:
            return self._feeds[feed_id]
        except KeyError:
            raise DataError(f"unknown feed {feed_id!r}") from None

    @property
    def feed_ids(self) -> list[str]:
        return list(self._feeds)

    def lifecycle_of(self, feed_id: str) -> FeedLifecycle | None:
        """The feed's :class:`FeedLifecycle` itself (None before its first reading), for the
        replay's quiet runs (:mod:`.quiet_run`), which advance it in bulk."""
        return self._feeds.get(feed_id)

    def state_of(self, feed_id: str) -> str:
        """``learning``, ``fitting`` or ``watching``."""
        return self._get(feed_id).state

    def process(self, reading: Reading) -> EngineOutput:
        """Take one reading of any feed.

        Output queued by :meth:`restore` is delivered with it.
        """
        if not isinstance(reading, Reading):
            raise DataError(f"Engine.process needs a Reading, got {type(reading).__name__}")
        feed = self._feeds.get(reading.feed_id)
        if feed is not None and self.quiet_steps and self._queued.is_empty:
            quiet = step_quiet(feed, reading, self._clock)
            if quiet is not None:
                self.quiet_readings += 1
                return quiet
        out = self._take_queued()
        if feed is None:
            feed = FeedLifecycle(reading.feed_id, self._settings_for(reading.feed_id))
            self._feeds[reading.feed_id] = feed
            out.state_changes.append(StateChange(reading.feed_id, "new", "learning", reading.timestamp,
                                                 "first reading; learning the feed's model"))
        return out.extend(feed.process(reading, self._clock))

    def tick(self, now: datetime) -> EngineOutput:
        """Advance the clock (wall-clock time live, data time in a replay): stale feeds."""
        if not isinstance(now, datetime) or now.tzinfo is None:
            raise DataError(f"Engine.tick needs a timezone-aware datetime, got {now!r}")
        self._clock = now
        out = self._take_queued()
        for feed in self._feeds.values():
            out.extend(feed.tick(now))
        return out

    def install_model(self, feed_id: str, fitted: FittedModel, model_version: int, reason: str,
                      thresholds: AlarmLimits | dict[str, Any] | None = None,
                      request: RefitRequest | None = None) -> EngineOutput:
        """Swap in a finished fit for the feed's pending request.

        Parameters
        ----------
        feed_id : str
        fitted : FittedModel
            :func:`run_refit` of the pending request.
        model_version : int
            The version the service recorded for this model.
        reason : str
            Why it was fitted (usually the request's reason), shown in status.
        thresholds : AlarmLimits or dict, optional
            Limits from :func:`thresholds_for` (computed here when omitted).
        request : RefitRequest, optional
            The request answered; refused when it is not the pending one.

        Returns
        -------
        EngineOutput
            The state change, and for an initial fit the events of the
            replayed readings.
        """
        out = self._take_queued()
        return out.extend(self._get(feed_id).install(fitted, model_version, reason, thresholds, request))

    def accept_level(self, feed_id: str, at: datetime, by: str, note: str) -> EngineOutput:
        """An operator accepts the feed's present level as its new normal.

        Closes the feed's open level-shift (``cusum``) episode at ``at`` with
        the detail "accepted as the new normal by {by}: {note}"; the level
        condition is dropped and the CUSUM restarts.

        Raises
        ------
        DataError
            An unknown feed, a naive ``at``, or no open level-shift episode.
        """
        if not isinstance(at, datetime) or at.tzinfo is None:
            raise DataError(f"Engine.accept_level needs a timezone-aware datetime, got {at!r}")
        out = self._take_queued()
        return out.extend(self._get(feed_id).accept_level(at, str(by), str(note)))

    def refit_failed(self, feed_id: str, error: str) -> EngineOutput:
        """Report that the pending fit failed (``str(FitError)``); the feed goes on as described in :mod:`.feed`."""
        out = self._take_queued()
        return out.extend(self._get(feed_id).refit_failed(str(error)))

    def checkpoint(self, feed_id: str) -> bytes:
        """The feed's whole state as bytes (:mod:`.feed_state`); only a feed with a model has one."""
        return feed_checkpoint(self._get(feed_id))

    def checkpoints(self) -> dict[str, tuple[bytes, int]]:
        """``{feed_id: (state bytes, model_version)}`` of every feed that has a model."""
        return {fid: (feed_checkpoint(feed), feed.model_version) for fid, feed in self._feeds.items()
                if feed.monitor is not None and feed.state == "watching"}

    def snapshot_ready(self, feed_id: str) -> bool:
        """True when the feed watches with no fit in flight: a snapshot of it can be resumed exactly."""
        feed = self._get(feed_id)
        return feed.state == "watching" and feed.monitor is not None and feed.pending is None

    def model_version_of(self, feed_id: str) -> int | None:
        """The version of the model the feed watches with (None before its first)."""
        return self._get(feed_id).model_version

    def restore(self, feed_id: str, state: bytes, model_version: int) -> None:
        """Resume a feed from its checkpoint: watching at once, no learning phase, no refit.

        The state change (and, rarely, the closing of episodes whose rule
        settings changed) is delivered with the next output of
        :meth:`process`, :meth:`tick` or :meth:`install_model`. A refit that
        was in flight at checkpoint time is requested again at the next slot.

        Raises
        ------
        StateFormatError
            Bytes that are not a checkpoint of this feed and version, or a
            grid or counter setting that changed since (the feed must learn again).
        """
        if feed_id in self._feeds:
            raise DataError(f"feed {feed_id!r} is already running; restore it before its first reading")
        feed, out = feed_from_checkpoint(FeedLifecycle, feed_id, self._settings_for(feed_id), state, model_version)
        self._feeds[feed_id] = feed
        self._queued.extend(out)

    def feed_status(self, feed_id: str) -> dict[str, Any]:
        """One feed's status dict (see ``FeedLifecycle.status``)."""
        return self._get(feed_id).status()

    def counts(self) -> tuple[int, int]:
        """(feeds, alarm episodes open now): what :meth:`status` would count, without building
        every feed's status (a service's periodic summary at 10,000 feeds spent most of its time there)."""
        active = sum(len(feed.monitor.open_events()) for feed in self._feeds.values() if feed.monitor is not None)
        return len(self._feeds), active

    def status(self) -> list[dict[str, Any]]:
        """One JSON-serialisable dict per feed (see ``FeedLifecycle.status``), sorted by feed id."""
        return [self._feeds[fid].status() for fid in sorted(self._feeds)]
