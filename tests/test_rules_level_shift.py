"""The re-anchoring estimate, checked against the stream's own Kalman filter.

The model's step response (level_shift.py Notes) is an exact statement about
the filter: on noise-free readings that jump by D, the innovations the
stream produces must equal D g_j, the estimate must recover D exactly, and
after ``shift_level(delta)`` the forecasts must settle on the new level.
The filter itself is held to statsmodels by the core's own tests.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from leadline.detector.rules.level_shift import estimate_level_shift
from leadline.detector.statespace import LinearSystem
from leadline.detector.stream import Stream


def ar1_system(phi: float) -> LinearSystem:
    return LinearSystem(design=np.array([1.0]), obs_intercept=0.0, obs_cov=0.0, transition=np.array([[phi]]),
                        state_intercept_const=np.zeros(1), state_intercept_slope=np.zeros(1),
                        state_cov=np.array([[1.0]]))


def local_level_system(s_eps: float, s_eta: float) -> LinearSystem:
    return LinearSystem(design=np.array([1.0]), obs_intercept=0.0, obs_cov=s_eps, transition=np.array([[1.0]]),
                        state_intercept_const=np.zeros(1), state_intercept_slope=np.zeros(1),
                        state_cov=np.array([[s_eta]]))


def arma11_system(phi: float, theta: float) -> LinearSystem:
    # Harvey form: state (x_t, theta e_t), Z = (1, 0), T = [[phi, 1], [0, 0]], R = (1, theta)
    R = np.array([1.0, theta])
    return LinearSystem(design=np.array([1.0, 0.0]), obs_intercept=0.0, obs_cov=0.0,
                        transition=np.array([[phi, 1.0], [0.0, 0.0]]), state_intercept_const=np.zeros(2),
                        state_intercept_slope=np.zeros(2), state_cov=np.outer(R, R))


def steady_stream(system: LinearSystem) -> Stream:
    """A stream at the steady state with a zero state (the level 0)."""
    k = system.k_states
    P = np.eye(k) * 10.0
    for _ in range(2000):  # iterate the Riccati recursion to convergence
        PZ = P @ system.design
        F = float(system.design @ PZ) + system.obs_cov
        P = system.transition @ (P - np.outer(PZ, PZ) / F) @ system.transition.T + system.state_cov
    return Stream(system, np.zeros(k), P, 0)


def feed(stream: Stream, values, absorb=None):
    run = []
    for i, v in enumerate(values):
        inn = stream.update(v, absorb=True if absorb is None else absorb[i])
        run.append((inn.z, inn.std, inn.absorbed))
    return run


@pytest.mark.parametrize("system", [ar1_system(0.7), ar1_system(-0.4), arma11_system(0.6, 0.3),
                                    local_level_system(1.0, 0.5)], ids=["ar1", "ar1-neg", "arma11", "local-level"])
def test_the_estimate_recovers_a_noise_free_step_exactly(system):
    stream = steady_stream(system)
    D = 3.7
    run = feed(stream, [D] * 12)
    est = estimate_level_shift(system, stream.cov, run)
    assert est.start == 0
    assert est.size == pytest.approx(D, rel=1e-9)


def test_the_change_point_is_found_inside_the_run():
    system = ar1_system(0.5)
    stream = steady_stream(system)
    run = feed(stream, [0.0] * 7 + [-2.5] * 9)
    est = estimate_level_shift(system, stream.cov, run)
    assert est.start == 7 and est.size == pytest.approx(-2.5, rel=1e-9)


def test_unabsorbed_readings_are_accounted_for():
    # Unabsorbed readings move the filter off its steady gain for a while; the
    # estimate uses one gain (the current one), so it is close, not exact.
    system = arma11_system(0.6, 0.3)
    stream = steady_stream(system)
    absorb = [False, False, True, False, True, True, True, True]
    run = feed(stream, [5.0] * 8, absorb)
    assert [a for _, _, a in run] == absorb
    est = estimate_level_shift(system, stream.cov, run)
    assert est.size == pytest.approx(5.0, rel=0.05)
    # treating every reading as absorbed would be far off (the contrast)
    wrong = estimate_level_shift(system, stream.cov, [(z, sd, True) for z, sd, _ in run])
    assert abs(wrong.size - 5.0) > 0.5


def test_after_reanchoring_a_stationary_model_settles_on_the_new_level():
    system = ar1_system(0.7)
    stream = steady_stream(system)
    run = feed(stream, [4.0] * 6)
    est = estimate_level_shift(system, stream.cov, run)
    assert est.delta == pytest.approx(4.0, rel=1e-9)  # stationary: the whole shift
    stream.shift_level(est.delta)
    tail = feed(stream, [4.0] * 60)
    assert abs(tail[-1][0]) < 1e-9
    # without the re-anchoring the innovations would stay at (1 - phi) * 4 (the contrast)
    plain = steady_stream(system)
    assert feed(plain, [4.0] * 66)[-1][0] == pytest.approx(0.3 * 4.0, rel=1e-6)


def test_after_reanchoring_a_random_walk_is_not_moved_twice():
    system = local_level_system(1.0, 0.5)
    stream = steady_stream(system)
    run = feed(stream, [6.0] * 3)
    est = estimate_level_shift(system, stream.cov, run)
    assert 0 < est.delta < 6.0  # the level state already followed part of the step
    stream.shift_level(est.delta)
    after = feed(stream, [6.0] * 5)
    assert max(abs(z) for z, _, _ in after) < 1e-9
    # moving by the whole shift would overshoot (the contrast)
    other = steady_stream(system)
    feed(other, [6.0] * 3)
    other.shift_level(6.0)
    assert abs(feed(other, [6.0])[0][0]) > 1.0


def test_no_usable_step_gives_none():
    system = ar1_system(0.5)
    assert estimate_level_shift(system, np.eye(1), []) is None
    assert estimate_level_shift(system, np.eye(1), [(math.nan, 1.0, False)]) is None
