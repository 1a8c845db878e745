"""Advance a watching feed over a run of quiet readings at once: the replay's fast path.

Most readings of a healthy feed change nothing but numbers: the filter
steps, the CUSUM sums move below h, the noise-burst window slides, and no
rule's state machine moves. :func:`advance_quiet` takes such a run of
readings of one feed (in order, from a history) and leaves the feed
exactly as :meth:`FeedLifecycle.process <leadline.detector.feed.FeedLifecycle.process>`
called reading by reading would have left it, at a fraction of the cost:

* the filter, the CUSUM sums and the flatline run are stepped in one tight
  loop over plain floats, with the same operations in the same order as the
  per-reading path (:meth:`Stream.update <leadline.detector.stream.Stream.update>`'s
  steady step, :meth:`TabularCusum._add`, :meth:`FlatlineRule.assess`), so
  their values are bit for bit the same;
* everything else is done on arrays: the grid placement, the future-reading
  and stale checks, the range check, the noise-burst statistic (a
  conservative check; the window is then rebuilt exactly), the rings of the
  refit window, the diagnostics, the re-anchoring history, the level
  condition and the lifecycles' on-delay windows;
* a model with calendar terms takes d_t (and the level condition its
  x_t' beta) slot by slot from the stream's own block cache, as the steps
  one by one do.

:func:`learn_quiet` does the same for a feed still learning, before its
grid exists: its readings are kept in bulk up to the one that fills the
training window.

The run stops *before* the first reading at which anything could happen
(a |z| at the spike warning or insulation level, a CUSUM signal, a flatline
alarm, a noise-burst statistic within 1e-9 of its limit, a reading off the
next grid slot, missing, out of range or ahead of the clock, a gap the stale
rule would see) and after the first reading at which the feed would ask for
a refit (a scheduled refit falls due, or a diagnostics check finds the fit
degraded; the checks that find nothing are made inside the run); the caller
hands the next reading to the per-reading path. The feed must be watching
with a steady-state filter, no refit in flight, no episode open and none of
the rules this path does not cover (EWMA, drift) configured; otherwise
:func:`advance_quiet` returns None and changes nothing.

Its equality with the per-reading path is tested state for state
(the checkpoint bytes) and event for event in ``tests/test_quiet_run.py``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any

import numpy as np

from .engine_output import EngineOutput
from .innovation import Innovation
from .rules.flatline import repeat_probability
from .stream import steady_step_source

__all__ = ["QuietPlan", "QuietRun", "advance_quiet", "covered_plan", "learn_quiet", "MAX_RUN", "COVERED_RULES"]

#: Most readings taken in one run (bounds the arrays of one call).
MAX_RUN = 4096
#: Fewest readings worth a run: below this the per-reading path is as quick.
MIN_RUN = 4
#: The rules a quiet run covers; a feed with any other rule is left to the per-reading path.
COVERED_RULES = frozenset({"spike", "cusum", "noise_burst", "flatline", "range", "stale"})
#: Margin (seconds) kept from the stale and future limits, which the per-reading path
#: compares on microsecond datetimes: a gap this close to a limit is left to it.
_TIME_MARGIN_S = 1e-3


@dataclass
class QuietRun:
    """What one quiet run did.

    Attributes
    ----------
    count : int
        Readings taken.
    rows : ndarray, shape (count, 5)
        The scored slots as evidence rows (epoch_s, value, forecast, lower,
        upper), for :meth:`EvidenceRecorder.slots <leadline.detector.evidence.EvidenceRecorder.slots>`.
    output : EngineOutput
        What the last reading produced: a refit request at most, no events.
    """

    count: int
    rows: np.ndarray
    output: EngineOutput


def _utc(epoch_s: float) -> datetime:
    return datetime.fromtimestamp(float(epoch_s), tz=timezone.utc)


class QuietPlan:
    """What quiet steps and runs of one monitor need, worked out once per monitor (its rules never
    change; a refit brings a new monitor)."""

    __slots__ = ("z_limit", "lifecycles", "windows", "cusum", "burst", "flat", "range", "stale", "timeout_s")

    def __init__(self, mon: Any) -> None:
        self.z_limit = _z_limit(mon)
        self.lifecycles = tuple(mon.lifecycles.values())
        # the on-delay windows that take a quiet step (all but the stale rule's, as _commit)
        self.windows = tuple((life, life._window) for life in self.lifecycles if life.rule != "stale")
        self.cusum = mon.cusum
        self.burst = mon.noise_burst
        self.flat = mon.rules.get("flatline")
        self.range = mon.range
        self.stale = mon.stale
        # the stale limit in seconds (its own microsecond rounding is inside the 1 ms margin)
        self.timeout_s = None if mon.stale is None else mon.stale.interval_s * mon.stale.missing_intervals


def covered_plan(feed: Any) -> QuietPlan | None:
    """The feed's :class:`QuietPlan` when the feed is in a state a quiet run or step can start
    from, else None: watching with a steady filter, no refit requested or in flight, no counter,
    only the rules :data:`COVERED_RULES`, no re-anchoring settling or waiting for confirmation,
    no episode open, no level tracked, no CUSUM held.

    The plan is kept on the feed with the monitor it was made for.
    """
    if feed.state != "watching" or feed.pending is not None or feed.refit_due is not None \
            or feed.counter is not None or feed.monitor is None:
        return None
    mon = feed.monitor
    if not mon.stream._steady or mon._settle is not None or mon._unconfirmed is not None \
            or mon._shock_candidate is not None or mon.level._level_before is not None:
        return None
    kept = feed._quiet_plan
    if kept is None or kept[0] is not mon:
        kept = feed._quiet_plan = (mon, QuietPlan(mon) if COVERED_RULES.issuperset(mon.rules) else None)
    plan = kept[1]
    if plan is None:
        return None
    for life in plan.lifecycles:
        if life._event is not None:
            return None
    if plan.cusum is not None and plan.cusum.cusum.holding:
        return None
    return plan


def _limit(feed: Any, epoch_s: np.ndarray, values: np.ndarray, clock_epoch_s: np.ndarray) -> int:
    """The longest run the array checks allow (before the loop's own checks)."""
    mon = feed.monitor
    n = values.size
    ok = np.isfinite(values)
    rng = mon.range
    if rng is not None:
        if rng.low is not None:
            ok &= values >= rng.low
        if rng.high is not None:
            ok &= values <= rng.high
    tolerance = feed.settings.future_tolerance_s
    if tolerance is not None:
        ok &= ~(epoch_s - clock_epoch_s > tolerance)  # NaN clock: no clock yet, nothing is ahead of it
    count = n if ok.all() else int(np.argmin(ok))
    count = min(count, feed.cursor.run_length(epoch_s[:count]))
    stale = mon.stale
    if stale is not None and count:
        timeout_s = stale.timeout.total_seconds()
        if stale.last_seen is None:
            return 0
        gaps = np.diff(np.concatenate([[stale.last_seen.timestamp()], epoch_s[:count]]))
        fine = (gaps > _TIME_MARGIN_S) & (gaps < timeout_s - _TIME_MARGIN_S)
        count = count if fine.all() else int(np.argmin(fine))
        if stale.last_tick is not None and count and \
                stale.last_tick.timestamp() - epoch_s[0] > timeout_s - _TIME_MARGIN_S:
            return 0
    settings = feed.settings
    if settings.refit_every_s is not None and feed.next_refit_epoch_s is not None and count:
        cursor = feed.cursor
        slots = feed.next_slot + np.arange(count)
        due = np.flatnonzero(cursor.origin_epoch_s + slots * cursor.interval_s >= feed.next_refit_epoch_s)
        if due.size:
            count = int(due[0]) + 1
    return count


_SCAN_HEAD = """\
def scan(values, intercepts, a, gain, d, t, sqrt_f, z_limit, cusum, flat, coefficients):
    {unpack_coefficients}
    {unpack_a} = a
    {unpack_gain} = gain
    s_hi, s_lo, n_hi, n_lo, start_hi, start_lo, calls, k, h, clip = cusum
    previous, run, log_p, tol, half, habits, log_limit = flat
    forecasts = []
    zs = []
    keep_forecast = forecasts.append
    keep_z = zs.append
    for {loop}:
        f = {forecast}
        v = y - f
        z = v / sqrt_f
        if not -z_limit < z < z_limit:
            break
"""
# the CUSUM as TabularCusum.update and _add step it, max(0.0, x) written as x if x > 0.0 else 0.0
_SCAN_CUSUM = """\
        call = calls + 1
        zc = {clipped}
        new_start_hi = call if s_hi == 0.0 else start_hi
        new_start_lo = call if s_lo == 0.0 else start_lo
        new_hi = s_hi + zc - k
        new_hi = new_hi if new_hi > 0.0 else 0.0
        new_lo = s_lo - zc - k
        new_lo = new_lo if new_lo > 0.0 else 0.0
        if new_hi > h or new_lo > h:
            break
"""
# the flatline run as FlatlineRule.assess judges it
_SCAN_FLAT = """\
        if previous is None or abs(y - previous) > tol:
            run, log_p = 0, 0.0
        else:
            p = repeat_probability(previous, f, sqrt_f, half)
            habitual_run = 0
            if habits is not None:
                p = max(p, habits.probability(previous))
                habitual_run = habits.longest_run(previous)
            if (log_p + (log(p) if p > 0 else -inf)) < log_limit and run + 1 > habitual_run:
                break
            run, log_p = run + 1, log_p + (log(p) if p > 0 else -inf)
        previous = y
"""
_SCAN_TAIL = """\
        {unpack_a} = {next_state}
        t += 1
        keep_forecast(f)
        keep_z(z)
    return (len(zs), ({unpack_a}), forecasts, zs, (s_hi, s_lo, n_hi, n_lo, start_hi, start_lo, calls),
            (previous, run, log_p))
"""
_SCAN_CUSUM_COMMIT = """\
        calls = call
        start_hi, start_lo = new_start_hi, new_start_lo
        s_hi, s_lo = new_hi, new_lo
        n_hi = n_hi + 1 if s_hi > 0 else 0
        n_lo = n_lo + 1 if s_lo > 0 else 0
"""
_compiled_scans: dict[str, Any] = {}


def _scan_function(system: Any, cusum: bool, clip: bool, flat: bool,
                   calendar: bool = False) -> tuple[Any, tuple[float, ...]]:
    """The scan loop for this model and these rules, and the model's coefficients to pass it.

    The steady step is written inline (:func:`~leadline.detector.stream.steady_step_source`)
    with the model's matrix entries as names, so the loop compiles once per model structure and
    set of rules and is shared by every model of that structure; with ``calendar`` d_t comes
    per slot from ``intercepts``, else it is the constant ``d``.
    """
    coefficients: dict[str, float] = {}
    unpack_a, unpack_gain, forecast, next_state = steady_step_source(system, coefficients)
    names = list(coefficients)
    unpack = f"{', '.join(names)}{',' if len(names) == 1 else ''} = coefficients" if names else "pass"
    source = _SCAN_HEAD.format(unpack_coefficients=unpack, unpack_a=unpack_a, unpack_gain=unpack_gain,
                               forecast=forecast,
                               loop="y, d in zip(values, intercepts)" if calendar else "y in values")
    if cusum:
        source += _SCAN_CUSUM.format(clipped="(clip if z > clip else (-clip if z < -clip else z))" if clip else "z")
    if flat:
        source += _SCAN_FLAT
    if cusum:
        source += _SCAN_CUSUM_COMMIT
    source += _SCAN_TAIL.format(unpack_a=unpack_a, next_state=next_state)
    function = _compiled_scans.get(source)
    if function is None:
        if len(_compiled_scans) >= 256:  # a site has a handful of structures; never grow without bound
            _compiled_scans.clear()
        namespace: dict[str, Any] = {"repeat_probability": repeat_probability, "log": math.log, "inf": math.inf}
        exec(compile(source, "<leadline quiet scan>", "exec"), namespace)  # noqa: S102 - names only
        function = _compiled_scans[source] = namespace["scan"]
    return function, tuple(coefficients.values())


def _scan(mon: Any, values: list[float], count: int, z_limit: float,
          intercepts: list[float] | None = None) -> tuple[int, tuple, list, list, tuple, tuple]:
    """Step the filter, the CUSUM and the flatline run over up to ``count`` readings.

    Stops before the first reading with |z| >= ``z_limit``, a CUSUM signal or
    a flatline alarm. Returns (readings taken, the filter's state, forecasts,
    z, the CUSUM's run state, the flatline's run state); the two run states
    are empty tuples for a rule the feed does not run.
    """
    stream = mon.stream
    cusum = mon.cusum.cusum if mon.cusum is not None else None
    flat = mon.rules.get("flatline")
    cusum_in = (*cusum.run_state(), cusum.k, cusum.h, cusum.clip_abs_z) if cusum is not None else (0.0,) * 10
    flat_in = (*flat.run_state(), flat.tolerance, flat.half_width, flat.habits, flat._log_limit) \
        if flat is not None else (None, 0, 0.0, 0.0, 0.0, None, 0.0)
    key = (cusum is not None, cusum is not None and cusum.clip_abs_z is not None, flat is not None,
           intercepts is not None)
    # the loop and the model's coefficients, looked up once per model and kept with its stream
    scans = stream.__dict__.setdefault("_quiet_scans", {})
    found = scans.get(key)
    if found is None:
        found = scans[key] = _scan_function(stream.system, *key)
    scan, coefficients = found
    taken, a, forecasts, zs, cusum_state, flat_state = scan(
        values[:count], intercepts, stream._a_tuple, stream._gain, stream._d_const, stream.step, stream._sqrtF_ss,
        z_limit, cusum_in, flat_in, coefficients)
    return (taken, a, forecasts, zs, cusum_state if cusum is not None else (),
            flat_state if flat is not None else ())


def _z_limit(mon: Any) -> float:
    """The |z| at which a reading stops being quiet: insulation, the spike warning, the screens."""
    limit = mon.insulation_abs_z if mon.config.insulate_outliers else math.inf
    if "spike" in mon.rules:
        limit = min(limit, mon.rules["spike"].warning_abs_z)
    if mon.cusum is not None and mon.cusum.cusum.screen_abs_z is not None:
        limit = min(limit, mon.cusum.cusum.screen_abs_z)
    burst = mon.noise_burst
    if burst is not None and burst.screen_abs_z is not None:
        limit = min(limit, burst.screen_abs_z)
    return limit


def advance_quiet(feed: Any, epoch_s: np.ndarray, values: np.ndarray, clock_epoch_s: np.ndarray) -> QuietRun | None:
    """Take the quiet readings at the head of ``epoch_s``/``values`` (see the module docstring).

    Parameters
    ----------
    feed : FeedLifecycle
    epoch_s, values : ndarray
        The feed's next readings, in order (UTC seconds since the epoch,
        readings), at most :data:`MAX_RUN` are looked at.
    clock_epoch_s : ndarray
        The engine's clock when each reading arrives (NaN: no clock yet), for
        the future-reading check.

    Returns
    -------
    QuietRun or None
        None when no run of at least :data:`MIN_RUN` readings can be taken;
        the feed is then unchanged.
    """
    if covered_plan(feed) is None:
        return None
    epoch_s = np.asarray(epoch_s[:MAX_RUN], dtype=float)
    values = np.asarray(values[:MAX_RUN], dtype=float)
    clock_epoch_s = np.asarray(clock_epoch_s[:MAX_RUN], dtype=float)
    count = _limit(feed, epoch_s, values, clock_epoch_s)
    if count < MIN_RUN:
        return None
    mon = feed.monitor
    z_limit = _z_limit(mon)
    ys = values[:count].tolist()
    stream = mon.stream
    intercepts = calendar = None
    if stream.regression is not None:
        # d_t and x_t' beta slot by slot, as the steps ask for them; the cache is put back until
        # the run's length is known
        cache = stream.intercept_cache()
        intercepts, calendar = stream.intercepts(count)
        stream.restore_intercept_cache(cache)
    scanned = _scan(mon, ys, count, z_limit, intercepts)
    taken = scanned[0]
    if mon.noise_burst is not None and taken:
        burst_ok = mon.noise_burst.quiet_run_length(scanned[3])
        if burst_ok < taken:
            scanned = _scan(mon, ys, burst_ok, z_limit, intercepts)
            taken = scanned[0]
    checks = None
    if feed.settings.diagnostics_refit and taken:
        checks = _diagnostics_ahead(feed, scanned[3])
        if checks[0] is not None:  # a check falls due and finds the fit degraded: end the run there
            scanned = _scan(mon, ys, checks[0], z_limit, intercepts)
            taken = scanned[0]
            checks = _diagnostics_ahead(feed, scanned[3])
    if taken < MIN_RUN:
        return None
    if intercepts is not None:
        stream.intercepts(taken)  # the cache as the run's steps leave it
        calendar = np.asarray(calendar[:taken])
    return _commit(feed, epoch_s[:taken], values[:taken], scanned, checks, calendar)


def _diagnostics_ahead(feed: Any, zs: list[float]) -> tuple[int | None, int, dict | None]:
    """The diagnostics checks falling due inside the run, as :meth:`FeedLifecycle._maybe_refit`
    makes them: skipped within a refit window of the last diagnostics refit, else judged."""
    first_slot, last_diag = feed.next_slot, feed.last_diag_refit_slot
    window = feed.settings.refit_window_points

    def skipped(count: int) -> bool:
        return last_diag is not None and first_slot + count - 1 - last_diag < window

    return feed.diagnostics.checks_ahead(np.asarray(zs), skipped)


def _commit(feed: Any, epoch_s: np.ndarray, values: np.ndarray, scanned: tuple,
            checks: tuple[int | None, int, dict | None] | None, calendar: np.ndarray | None) -> QuietRun:
    """Leave the feed as the per-reading path leaves it after these readings."""
    taken, a, forecasts, zs, cusum_state, flat_state = scanned
    mon = feed.monitor
    stream = mon.stream
    last_time = _utc(epoch_s[-1])
    last_value = float(values[-1])
    z = np.asarray(zs)
    forecast = np.asarray(forecasts)
    # the stream: its steady state moved on
    f = forecasts[-1]
    last = Innovation(stream.step + taken - 1, last_value, f, last_value - f, stream._F_ss, zs[-1],
                      f - stream._halfwidth_ss, f + stream._halfwidth_ss, stream.level, True, last_time)
    stream._a_tuple = a
    stream._t += taken
    # the monitor and its rules
    mon.readings += taken
    if mon.stale is not None:
        mon.stale.last_seen = last_time
    # the level condition keeps readings less the model's calendar part, as FeedMonitor._process does
    mon.level.observe_many(values if calendar is None else values - calendar)
    mon._shock_candidate = None
    mon._last_absorbed = True
    mon._history.extend(z, stream._sqrtF_ss, True)
    mon._steps += taken
    mon.last_innovation = last
    for life in mon.lifecycles.values():
        if life.rule != "stale":
            life.pass_quiet(taken)
    if mon.cusum is not None:
        mon.cusum.cusum.resume(cusum_state)
        mon.cusum.last_signal = None
    if mon.noise_burst is not None:
        mon.noise_burst.extend_quiet(z)
    flat = mon.rules.get("flatline")
    if flat is not None:
        flat.resume(flat_state)
    # the feed: grid, counts, refit window, diagnostics
    feed.readings += taken
    feed.last_time, feed.last_value, feed.last_seen = last_time, last_value, last_time
    feed.cursor.place_run(epoch_s)
    last_slot = feed.next_slot + taken - 1
    feed.next_slot += taken
    feed.history.extend(values - stream.level_offset)
    if checks is None:
        feed.diagnostics.add_absorbed(z)
    else:
        feed.diagnostics.take_checked(z, checks[1], checks[2])
    out = EngineOutput()
    feed._maybe_refit(last_slot, out)
    half = stream._halfwidth_ss
    rows = np.column_stack([epoch_s, values, forecast, forecast - half, forecast + half])
    return QuietRun(taken, rows, feed.tag_events(out))


def learn_quiet(feed: Any, epoch_s: np.ndarray, values: np.ndarray, clock_epoch_s: np.ndarray) -> int:
    """Keep the learning readings at the head of ``epoch_s``/``values`` that do not fill the window.

    For a feed still learning before its grid exists: the readings are kept
    as :meth:`FeedLifecycle.process` keeps them one by one (finite values,
    none ahead of the clock), up to but not including the reading that
    completes the training window, which the caller hands to the
    per-reading path (it puts the window on a grid and asks for the fit).

    Returns
    -------
    int
        Readings taken (0 when the feed is not learning before its grid).
    """
    if feed.state != "learning" or feed.cursor is not None or feed.counter is not None:
        return 0
    epoch_s = np.asarray(epoch_s[:MAX_RUN], dtype=float)
    values = np.asarray(values[:MAX_RUN], dtype=float)
    ok = np.isfinite(values)
    tolerance = feed.settings.future_tolerance_s
    if tolerance is not None:
        ok &= ~(epoch_s - np.asarray(clock_epoch_s[:MAX_RUN], dtype=float) > tolerance)
    count = values.size if ok.all() else int(np.argmin(ok))
    if count == 0:
        return 0
    epoch_s, values = epoch_s[:count], values[:count]
    s = feed.settings
    real = feed.raw_real + np.arange(1, count + 1)
    low = np.minimum.accumulate(np.concatenate([[feed.raw_span[0]], epoch_s]))[1:]
    high = np.maximum.accumulate(np.concatenate([[feed.raw_span[1]], epoch_s]))[1:]
    full = (real >= feed.next_learning_check) & ((real >= s.train_points) | (high - low >= s.train_span_s))
    if full.any():
        count = int(np.argmax(full))
        if count == 0:
            return 0
        epoch_s, values, low, high = epoch_s[:count], values[:count], low[:count], high[:count]
    feed.readings += count
    feed.raw_epochs.extend(epoch_s.tolist())
    feed.raw_values.extend(values.tolist())
    feed.raw_real += count
    feed.raw_span = (float(low[-1]), float(high[-1]))
    feed.last_time, feed.last_value = _utc(epoch_s[-1]), float(values[-1])
    return count
