"""One quiet reading of a watching feed, live: the per-reading path without its machinery.

Most live readings of a healthy feed change nothing but numbers: the filter
steps, the CUSUM sums stay below h, the noise-burst window slides, and no
rule's state machine moves. :func:`step_quiet` recognises such a reading
*before* it changes anything, and then leaves the feed exactly as
:meth:`FeedLifecycle.process <leadline.detector.feed.FeedLifecycle.process>`
would have left it, returning the same output (the scored innovation, and
a refit request when one falls due), at 55-75% of the cost. It is the
single-reading counterpart of :func:`~.quiet_run.advance_quiet`, the replay's
bulk path, and shares its loop: the filter, the CUSUM and the flatline run
are stepped by the same generated code (:func:`~.quiet_run._scan`), so their
values are bit for bit those of the per-reading path.

A reading is quiet when all of these hold; otherwise :func:`step_quiet`
returns None, has changed nothing, and the caller takes the per-reading path:

* the feed is watching with a steady-state filter, no refit requested or in
  flight, no meter counter, no episode open, no level tracked, no CUSUM
  held, no re-anchoring settling or waiting for confirmation, and only the
  rules this path covers (:data:`~.quiet_run.COVERED_RULES`);
* the reading is finite, inside the range rule's limits, not ahead of the
  clock, lands exactly on the next grid slot, and comes after the last
  reading by more than a millisecond and less than the stale limit (less a
  millisecond), with the clock not past the stale limit;
* no scheduled refit falls due at its slot;
* its |z| is below the spike warning, the insulation level and the rules'
  screens, the CUSUM does not signal, the flatline rule does not alarm, and
  the noise-burst statistic stays below its raise limit by a relative 1e-9.

Its equality with the per-reading path, checkpoint byte for byte and event
for event, is tested in ``tests/test_quiet_step.py``.
"""

from __future__ import annotations

import math
from typing import Any

from .engine_output import EngineOutput
from .innovation import Innovation
from .quiet_run import _TIME_MARGIN_S, QuietPlan, _scan, covered_plan

__all__ = ["step_quiet"]


def step_quiet(feed: Any, reading: Any, clock: Any) -> EngineOutput | None:
    """Take ``reading`` when it is quiet for ``feed`` (see the module docstring), else None.

    Parameters
    ----------
    feed : FeedLifecycle
    reading : Reading
        The feed's next reading.
    clock : datetime or None
        The engine's clock (None: no clock yet), for the future-reading check.

    Returns
    -------
    EngineOutput or None
        The output :meth:`FeedLifecycle.process` would have given (no
        events; the innovation; a refit request at most), or None when the
        reading is not quiet, with the feed unchanged.
    """
    plan = covered_plan(feed)
    if plan is None:
        return None
    mon = feed.monitor
    stream = mon.stream
    ts = reading.timestamp
    if ts.tzinfo is None:
        return None
    value = reading.value
    if type(value) is not float:
        value = float(value)
    if not math.isfinite(value):
        return None
    rng = plan.range
    if rng is not None and ((rng.low is not None and value < rng.low) or (rng.high is not None and value > rng.high)):
        return None
    epoch = ts.timestamp()
    tolerance = feed.settings.future_tolerance_s
    if clock is not None and tolerance is not None and epoch - clock.timestamp() > tolerance:
        return None
    cursor = feed.cursor
    position = (epoch - cursor.origin_epoch_s) / cursor.interval_s
    slot = math.floor(position + 0.5)
    if slot != cursor.next_slot or slot != feed.next_slot or abs(position - slot) > cursor.tolerance:
        return None
    stale = plan.stale
    if stale is not None:
        last_seen = stale.last_seen
        if last_seen is None:
            return None
        timeout_s = plan.timeout_s
        gap = epoch - last_seen.timestamp()
        if not _TIME_MARGIN_S < gap < timeout_s - _TIME_MARGIN_S:
            return None
        if stale.last_tick is not None and stale.last_tick.timestamp() - epoch > timeout_s - _TIME_MARGIN_S:
            return None
    if feed.settings.refit_every_s is not None and feed.next_refit_epoch_s is not None \
            and cursor.slot_time(slot) >= feed.next_refit_epoch_s:
        return None
    level_value = value
    intercepts = None
    if stream.regression is not None:
        # the level condition's x_t' beta first, then d_t, as FeedMonitor._process asks for them
        level_value = value - stream.calendar_part(stream.step)
        intercepts = [stream._obs_intercept(stream.step)]
    taken, a, forecasts, zs, cusum_state, flat_state = _scan(mon, [value], 1, plan.z_limit, intercepts)
    if taken != 1:
        return None
    z = zs[0]
    burst = plan.burst
    burst_q = None
    if burst is not None:
        burst_q = burst.quiet_statistic(z)
        if burst_q is None:
            return None
    return _commit(feed, mon, stream, plan, ts, epoch, value, level_value, a, forecasts[0], z, cusum_state,
                   flat_state, burst_q)


def _commit(feed: Any, mon: Any, stream: Any, plan: QuietPlan, ts: Any, epoch: float, value: float,
            level_value: float, a: tuple, f: float, z: float, cusum_state: tuple, flat_state: tuple,
            burst_q: float | None) -> EngineOutput:
    """Leave the feed as the per-reading path leaves it after this reading (cf. ``quiet_run._commit``)."""
    half = stream._halfwidth_ss
    inn = Innovation(stream._t, value, f, value - f, stream._F_ss, z, f - half, f + half, stream.level, True, ts)
    stream._a_tuple = a
    stream._t += 1
    # the monitor and its rules
    mon.readings += 1
    if plan.stale is not None:
        plan.stale.last_seen = ts
    mon.level.observe(level_value)
    mon._last_absorbed = True
    mon._history.append(z, stream._sqrtF_ss, True)
    mon._steps += 1
    mon.last_innovation = inn
    for life, window in plan.windows:
        if window._bits or window._count < window._n:  # else already n normal steps: unchanged
            life.pass_quiet(1)
    if plan.cusum is not None:
        plan.cusum.cusum.resume(cusum_state)
        plan.cusum.last_signal = None
    if plan.burst is not None:
        plan.burst.push_quiet(z, burst_q)
    if plan.flat is not None:
        plan.flat.resume(flat_state)
    # the feed: grid, counts, refit window, diagnostics
    feed.readings += 1
    feed.last_time, feed.last_value, feed.last_seen = ts, value, ts
    slot = feed.cursor.place(epoch)
    feed.next_slot += 1
    feed.history.append(value - stream.level_offset)
    feed.diagnostics.add(inn)
    out = EngineOutput()
    out.innovations.append((feed.feed_id, inn))
    feed._maybe_refit(slot, out)
    return out  # no events: nothing for tag_events to tag
