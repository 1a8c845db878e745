"""The episodes of one feed that follow a condition rather than a single step: level shifts and stale outages.

:class:`LevelEpisodes` is a part of :class:`~.monitor.FeedMonitor` (it
shares the monitor's attributes): the CUSUM episode held open by the level
condition (:mod:`.level_condition`) and cleared when the readings return,
the operator's acceptance of a new level, and the stale outages found in
reading time (:meth:`~.stale.StaleRule.seen`). The semantics are those of
the monitor's module docstring, steps 6 and 7.
"""

from __future__ import annotations

from dataclasses import replace
from datetime import datetime
from typing import Any

from ..errors import DataError
from ..events import AlarmEvent
from ..innovation import Innovation
from .level_shift import estimate_level_shift
from .lifecycle import AlarmLifecycle, Assessment


class LevelEpisodes:
    """The level-shift and stale episode handling of :class:`~.monitor.FeedMonitor` (a mixin)."""

    def accept_level(self, when: datetime, by: str, note: str) -> list[AlarmEvent]:
        """An operator accepts the feed's present level as its new normal.

        Closes the open CUSUM (level-shift) episode at ``when`` with the
        detail "accepted as the new normal by {by}: {note}" and stops the
        level condition; the CUSUM restarts. The stream forecasts on the new
        level: it was re-anchored when the shift was confirmed, and a part
        it has not yet followed (a shift confirmed only once, or a drift
        since the last re-anchoring) is estimated from the innovations since
        then (:mod:`.level_shift`) and followed now when it is beyond three
        standard errors.

        Returns
        -------
        list of AlarmEvent
            The cleared event (empty when no level episode is open).
        """
        if not isinstance(when, datetime) or when.tzinfo is None:
            raise DataError(f"feed {self.feed_id!r}: accept time must be a timezone-aware datetime, got {when!r}")
        life = self.lifecycles.get("cusum")
        if life is None or not life.is_active:
            return []
        event = life.close(when, detail=f"accepted as the new normal by {by}: {note}")
        # the episode's readings and the CUSUM run before them; the estimate searches for the step
        steps = min(self._level_age + 2 * self.level.current_readings, self._steps - self._last_reanchor_step)
        if self.config.reanchor and steps > 0:
            estimate = estimate_level_shift(self.stream.system, self.stream.cov, self._history.rows()[-steps:])
            if estimate is not None and abs(estimate.size) > 3.0 * estimate.std_error:
                self._reanchor(estimate.delta, estimate, when, "accepted")
                self._settle = [] if self.config.settle_steps > 0 else None
                self._settle_prior_se = estimate.std_error
        self._end_level_episode()
        return [event]

    @property
    def level_episode_open(self) -> bool:
        """A CUSUM (level-shift) episode is open."""
        life = self.lifecycles.get("cusum")
        return life is not None and life.is_active

    def _stale_seen(self, timestamp: datetime, version: int | None) -> list[AlarmEvent]:
        """A reading with a value: close a live outage, or report a gap in reading time as one outage."""
        last = self.stale.last_seen
        gap = self.stale.seen(timestamp)
        life = self.lifecycles["stale"]
        if life.is_active:
            if last is None or timestamp <= last:
                return [life.close(timestamp)]
            tick = self.stale.last_tick
            if timestamp < life.current.start and tick is not None and tick > life.current.start:
                # the clock saw the silence, but the readings of it arrive now, late: the outage was
                # in delivery, and it lasted until this clock time
                detail = (f"{self.stale.outage_detail(last, tick)}; the readings of the gap arrived late, "
                          f"from {timestamp.isoformat()} on")
                return [life.close(tick, detail=detail)]
            return [life.close(timestamp, detail=self.stale.outage_detail(last, timestamp))]
        if gap is None:
            return []
        verdict, start = gap
        opened = life.open_now(verdict, start, None, version)
        return [opened, life.close(timestamp)]

    def _cusum_step(self, verdict: Assessment | None, signal: Any, when: datetime, inn: Innovation,
                    version: int | None) -> list[AlarmEvent]:
        """Step the CUSUM's lifecycle, its verdict judged by the level condition while an episode is open.

        While the condition holds the episode stays open (deadband); once it
        was established and the feed has returned, the episode clears after
        the off-delay, whatever the CUSUM says. Before the condition is
        established the CUSUM's own verdict decides, but not within the
        first ``current_readings`` readings of the episode (the current
        level's median still holds readings from before the run).
        """
        life = self.lifecycles["cusum"]
        was_open = life.is_active
        if verdict is not None and was_open and self.level.tracking:
            verdict = self._level_verdict(verdict)
        events = life.step(verdict, when, inn, version)
        if not was_open and life.is_active:
            self.level.start(signal.run_steps if signal is not None else 0)
            self._level_age = 0
            self._return_step = None
            self._level_onset = life.current.detail
            self._show_level(life)
        elif was_open and not life.is_active:
            described = self.level.describe()
            if described and events:
                events[-1] = replace(events[-1], detail=f"{self._level_onset}; at clearing: {described}")
            self._level_returned(when)
        elif life.is_active:
            self._show_level(life)
        return events

    def _calendar_part(self) -> float:
        """x_t' beta of the slot about to be scored (0 without calendar terms).

        The level condition compares levels, not times of day: the readings
        it keeps have the model's daily and weekly cycles taken out.
        """
        part = getattr(self.stream, "calendar_part", None)
        return 0.0 if part is None else part(self.stream.step)

    def _level_verdict(self, verdict: Assessment) -> Assessment:
        level = self.level
        if level.holds():
            self._return_step = None
            return Assessment(None, False, verdict.abs_z)
        if level.returned():
            if self._return_step is None:
                self._return_step = self._steps
            return Assessment(None, True, verdict.abs_z)
        if self._level_age < level.current_readings:
            return Assessment(None, False, verdict.abs_z)
        return verdict

    def _show_level(self, life: AlarmLifecycle) -> None:
        described = self.level.describe()
        if described:
            life.revise(f"{self._level_onset}; {described}")

    def _level_returned(self, when: datetime) -> None:
        """The level episode cleared: follow the return at once, then restart the CUSUM and the condition.

        The model was re-anchored on the shifted level; when the feed came
        back, the forecasts are moved back by the step estimated from the
        innovations since the return began (:mod:`.level_shift`), if it is
        beyond three standard errors and the CUSUM has not already followed
        the return itself, so that the return does not open an episode of
        its own.
        """
        if self._return_step is not None and self.level.established and self.config.reanchor:
            # the return began about a median's length before the condition saw it
            began = self._return_step - self.level.current_readings
            if self._last_reanchor_step < began:  # the CUSUM has not followed the return itself
                history = self._history.rows()[-(self._steps - began):]
                estimate = estimate_level_shift(self.stream.system, self.stream.cov, history)
                if estimate is not None and abs(estimate.size) > 3.0 * estimate.std_error:
                    self._reanchor(estimate.delta, estimate, when, "returned")
                    self._settle = [] if self.config.settle_steps > 0 else None
                    self._settle_prior_se = estimate.std_error
        self._end_level_episode()

    def _end_level_episode(self) -> None:
        self.level.stop()
        self._level_age = 0
        self._return_step = None
        self._level_onset = ""
        self._unconfirmed = None
        if self.cusum is not None:
            self.cusum.reset()
