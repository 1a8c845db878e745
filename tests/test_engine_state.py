"""Engine state and counters: checkpoint and restore, counter deltas, the diagnostics' statistics.

References: a restored engine must give exactly (==) the innovations and
events of an engine that ran uninterrupted (the stream's own exactness
against statsmodels is checked in tests/test_stream_exactness.py); counter
deltas are compared with a hand computation by ``np.diff``; the
diagnostics' Ljung-Box p-value with statsmodels' ``acorr_ljungbox``, and
the expected winsorized square with numerical integration by scipy.
"""

from __future__ import annotations

import math
from dataclasses import replace
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
from scipy import integrate
from scipy.stats import norm

from leadline.detector.counters import CounterDeltas
from leadline.detector.diagnostics import clipped_square_mean, ljung_box_pvalue
from leadline.detector.engine import Engine, EngineOutput
from leadline.detector.errors import DataError, StateFormatError
from leadline.detector.events import CAUTION
from leadline.detector.readings import Reading
from leadline.detector.refit import RefitRequest, RingBuffer, run_refit
from leadline.detector.rules import MonitorConfig
from engine_helpers import ar1, settings

T0 = datetime(2024, 5, 6, tzinfo=timezone.utc)
INTERVAL_S = 60.0
FEED = "kestrel-hill/bulk/meter-2"


def at(i: float) -> datetime:
    return T0 + timedelta(seconds=INTERVAL_S * i)






def drive(engine: Engine, values, start: int = 0, version: list | None = None, install: bool = True,
          feed_id: str = FEED) -> tuple[EngineOutput, list[RefitRequest]]:
    """Feed ``values`` at slots start.., running each refit inline; version[0] counts the models."""
    version = version if version is not None else [0]
    out, requests = EngineOutput(), []
    for i, v in enumerate(values):
        step = engine.process(Reading(feed_id, at(start + i), float(v)))
        out.extend(step)
        for request in step.refit_requests:
            requests.append(request)
            if install:
                version[0] += 1
                out.extend(engine.install_model(feed_id, run_refit(request), version[0], request.reason))
    return out, requests


def scored(out: EngineOutput):
    return [(inn.step, inn.forecast, inn.variance, inn.z, inn.absorbed, inn.timestamp) for _, inn in out.innovations]


def episodes(out: EngineOutput):
    return [(ev.key, ev.end, ev.severity, ev.peak_abs_z, ev.detail, ev.model_version) for ev in out.events]


@pytest.fixture(scope="module")
def faulty_feed():
    y = ar1(1100, seed=5)
    y[600] += 10.0
    y[900:] += 3.0
    return y


@pytest.fixture(scope="module")
def uninterrupted(faulty_feed):
    engine = Engine(lambda feed_id: settings())
    out, _ = drive(engine, faulty_feed)
    return out


# -------------------------------------------------------- checkpoint/restore
@pytest.mark.parametrize("cut", [601, 903], ids=["inside-spike-episode", "inside-level-shift-run"])
def test_restore_resumes_without_learning_and_continues_exactly(faulty_feed, uninterrupted, cut):
    first = Engine(lambda feed_id: settings())
    drive(first, faulty_feed[:cut])
    if cut == 601:
        assert [a["rule"] for a in first.status()[0]["active_alarms"]] == ["spike"]
    saved = first.checkpoints()
    assert list(saved) == [FEED] and saved[FEED][1] == 1
    assert saved[FEED][0] == first.checkpoint(FEED)

    second = Engine(lambda feed_id: settings())
    second.restore(FEED, saved[FEED][0], 1)
    assert second.state_of(FEED) == "watching"
    out, requests = drive(second, faulty_feed[cut:], start=cut)
    assert requests == []  # no learning phase, no refit
    assert [(c.old, c.new) for c in out.state_changes] == [("new", "watching")]
    assert "no learning phase" in out.state_changes[0].detail

    offset = cut - 300  # innovations of the uninterrupted engine start at slot 300
    rest = EngineOutput(innovations=uninterrupted.innovations[offset:],
                        events=[ev for ev in uninterrupted.events if ev.start >= at(cut) or
                                (ev.end is not None and ev.end >= at(cut))])
    assert scored(out) == scored(rest)
    assert episodes(out) == episodes(rest)
    # the episodes of the whole run: one spike and one level shift, as without the restart
    assert sorted({ev.rule for ev in uninterrupted.events}) == ["cusum", "spike"]
    status = second.status()[0]
    assert status["readings"] == 1100 and status["slots"] == 1100 and status["model_version"] == 1


def test_restore_with_changed_rule_settings_closes_the_open_episodes(faulty_feed):
    first = Engine(lambda feed_id: settings())
    drive(first, faulty_feed[:601])
    data = first.checkpoint(FEED)
    changed = settings(monitor=MonitorConfig(range_low=0.0))
    second = Engine(lambda feed_id: changed)
    second.restore(FEED, data, 1)
    out, _ = drive(second, faulty_feed[601:602], start=601)
    closed = [ev for ev in out.events if ev.end is not None]
    assert [(ev.rule, ev.start) for ev in closed] == [("spike", at(600))]
    assert "closed at restart" in closed[0].detail
    assert "rule states restarted" in out.state_changes[0].detail


def test_restore_refuses_what_it_cannot_continue(faulty_feed):
    first = Engine(lambda feed_id: settings())
    drive(first, faulty_feed[:320])
    data = first.checkpoint(FEED)
    with pytest.raises(StateFormatError, match="bad magic"):
        Engine(lambda feed_id: settings()).restore(FEED, b"not a checkpoint", 1)
    with pytest.raises(StateFormatError, match="corrupt"):
        Engine(lambda feed_id: settings()).restore(FEED, data[:-200], 1)
    with pytest.raises(StateFormatError, match="model version 1, not 2"):
        Engine(lambda feed_id: settings()).restore(FEED, data, 2)
    with pytest.raises(StateFormatError, match="not 'other/feed'"):
        Engine(lambda feed_id: settings()).restore("other/feed", data, 1)
    with pytest.raises(StateFormatError, match="must learn again"):
        Engine(lambda feed_id: settings(interval_s=30.0)).restore(FEED, data, 1)
    learning = Engine(lambda feed_id: settings())
    drive(learning, faulty_feed[:50])
    with pytest.raises(DataError, match="learning and has no model"):
        learning.checkpoint(FEED)
    assert learning.checkpoints() == {}


def test_a_refit_in_flight_at_checkpoint_time_is_requested_again_after_restore(faulty_feed):
    s = settings(refit_every_s=100 * INTERVAL_S)
    first = Engine(lambda feed_id: s)
    drive(first, faulty_feed[:300])  # initial fit installed, fitted at slot 299
    _, requests = drive(first, faulty_feed[300:410], start=300, install=False)
    assert [r.reason for r in requests] == ["scheduled refit"]  # at slot 399, never answered
    data = first.checkpoint(FEED)
    second = Engine(lambda feed_id: s)
    second.restore(FEED, data, 1)
    out, requests = drive(second, faulty_feed[410:411], start=410, install=False)
    assert [r.reason for r in requests] == ["scheduled refit (requested again after a restart)"]
    assert requests[0].epoch_s[-1] == at(410).timestamp()


# ------------------------------------------------------------------ counters
def register(deltas: np.ndarray, start: float, size: float | None) -> np.ndarray:
    total = start + np.concatenate([[0.0], np.cumsum(deltas)])
    return total if size is None else np.mod(total, size)


def test_a_counter_feed_rolls_over_at_the_register_size_with_the_right_deltas():
    size = 1e4  # a 4-digit register
    deltas = ar1(699, seed=31, phi=0.5, mean=20.0, sd=2.0)
    readings = register(deltas, 9000.0, size)
    wraps = np.flatnonzero(np.diff(readings) < 0) + 1
    assert wraps.tolist() == [51, 542]  # one while learning, one while watching
    expected = np.diff(readings)
    expected[expected < 0] += size  # the hand computation

    engine = Engine(lambda feed_id: settings(counter=True, register_size=size))
    out, requests = drive(engine, readings)
    window = requests[0].values
    assert math.isnan(window[0])  # the first reading has no previous one
    # learning ends at 300 usable deltas: 301 register readings
    np.testing.assert_array_equal(window[1:], expected[:300])
    np.testing.assert_array_equal([inn.value for _, inn in out.innovations], expected[300:])
    assert out.events == []  # neither a meter reset nor an anomaly at the rollovers
    counter = engine.status()[0]["counter"]
    assert counter["rollover"] == 2 and counter["reset"] == 0 and counter["meter_resets"] == 0


@pytest.mark.parametrize("size", [None, 1e6], ids=["no-register-size", "6-digit-register"])
def test_a_meter_replacement_gives_one_meter_reset_event_and_no_anomaly(size):
    deltas = ar1(699, seed=32, phi=0.5, mean=20.0, sd=2.0)
    readings = register(deltas, 1000.0, size)
    # at slot 500 the meter is replaced by a new one that starts at 3.0
    readings[500:] = 3.0 + (readings[500:] - readings[500])
    engine = Engine(lambda feed_id: settings(counter=True, register_size=size))
    out, _ = drive(engine, readings)
    (event,) = out.events
    assert event.rule == "meter_reset" and event.severity == "warning"
    assert event.start == event.end == at(500) and event.value_at_onset == 3.0
    assert event.model_version == 1 and event.caution == CAUTION
    assert event.parameters["previous_reading"] == readings[499]
    steps = {inn.timestamp: inn for _, inn in out.innovations}
    assert steps[at(500)].is_missing  # the delta of the reset slot is not scored
    assert steps[at(501)].value == readings[501] - 3.0
    assert engine.status()[0]["counter"]["meter_resets"] == 1


def test_counter_deltas_kinds():
    c = CounterDeltas(register_size=None, reset_drop_fraction=0.5)
    kinds = [(s.kind, s.delta) for s in (c.step(0, 100.0), c.step(1, 104.0), c.step(2, 103.5),
                                          c.step(3, math.nan), c.step(4, 110.0), c.step(5, 112.0),
                                          c.step(6, 20.0), c.step(7, 25.0))]
    assert kinds[0][0] == "first" and math.isnan(kinds[0][1])
    assert kinds[1] == ("delta", 4.0)
    assert kinds[2] == ("backward", -0.5)  # a small step back is scored, not hidden
    assert kinds[3][0] == "missing"
    assert kinds[4][0] == "gap" and math.isnan(kinds[4][1])  # 110 - 103.5 covers two intervals
    assert kinds[5] == ("delta", 2.0)
    assert kinds[6][0] == "reset" and math.isnan(kinds[6][1])
    assert kinds[7] == ("delta", 5.0)
    back = CounterDeltas.from_dict(c.to_dict())
    assert back.to_dict() == c.to_dict()


# --------------------------------------------------------------- diagnostics
def test_the_expected_winsorized_square_matches_numerical_integration():
    for c in (1.5, 3.0, 4.0):
        # E[min(z^2, c^2)] by scipy's adaptive quadrature of the normal density
        inside, _ = integrate.quad(lambda z: z * z * norm.pdf(z), -c, c)
        assert clipped_square_mean(c) == pytest.approx(inside + c * c * 2 * norm.sf(c), rel=1e-10)


def test_ljung_box_matches_statsmodels():
    from statsmodels.stats.diagnostic import acorr_ljungbox

    x = ar1(240, seed=41, phi=0.2)
    reference = float(acorr_ljungbox(x, lags=[10])["lb_pvalue"].iloc[0])  # statsmodels as the reference
    assert ljung_box_pvalue(x, 10) == pytest.approx(reference, rel=1e-9)


def test_settings_can_be_rebuilt_for_a_restore_with_other_thresholds(faulty_feed):
    # sigma mode limits changed between runs: recomputed at restore, the rules restart
    first = Engine(lambda feed_id: settings(threshold_mode="sigma"))
    drive(first, faulty_feed[:320])
    data = first.checkpoint(FEED)
    changed = replace(settings(threshold_mode="sigma"), sigma_limits={"warning_abs_z": 3.5})
    second = Engine(lambda feed_id: changed)
    second.restore(FEED, data, 1)
    out, requests = drive(second, faulty_feed[320:330], start=320)
    assert requests == [] and len(out.innovations) == 10
    assert "rule states restarted" in out.state_changes[0].detail


def test_the_refit_window_ring_buffer_keeps_the_last_values_in_order():
    ring = RingBuffer(5, [1.0, 2.0, 3.0])
    for v in (4.0, 5.0, 6.0, 7.0):
        ring.append(v)
    assert ring.to_array().tolist() == [3.0, 4.0, 5.0, 6.0, 7.0] and len(ring) == 5
    ring.add(0.5)
    assert ring.to_array().tolist() == [3.5, 4.5, 5.5, 6.5, 7.5]
    assert RingBuffer(3, np.arange(10.0)).to_array().tolist() == [7.0, 8.0, 9.0]
    assert RingBuffer(3).to_array().size == 0
