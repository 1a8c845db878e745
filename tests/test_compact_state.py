"""The compact per-feed state: the float rings, the step history, the on-delay window."""

from __future__ import annotations

import math
from collections import deque

import numpy as np
import pytest

from leadline.detector.ring import RingBuffer
from leadline.detector.rules.level_shift import MAX_RUN_STEPS
from leadline.detector.rules.lifecycle import _OnDelayWindow
from leadline.detector.rules.step_history import StepHistory


def test_a_float32_ring_keeps_each_departure_to_single_precision():
    # a huge-scale feed, 1e6 +/- 10: float32 of the reading itself would keep only ~0.06;
    # a departure from the reference is rounded to 2**-24 of itself (IEEE 754 single precision)
    rng = np.random.default_rng(3)
    x = 1e6 + 10.0 * rng.standard_normal(500)
    ring = RingBuffer(400, x[:300], dtype=np.float32)
    for v in x[300:]:
        ring.append(float(v))
    got = ring.to_array()
    assert got.dtype == np.float64 and got.size == 400
    bound = 2.0 ** -24 * np.abs(x[100:] - ring.reference) + 1e-9
    assert np.all(np.abs(got - x[100:]) <= bound)
    assert np.max(np.abs(got - x[100:])) < 1e-5  # float32 of 1e6 itself would be off by up to 0.03
    assert np.max(np.abs(x[100:].astype(np.float32) - x[100:])) > 1e-3


def test_adding_a_constant_moves_the_reference_and_keeps_nan():
    ring = RingBuffer(4, [1.0, math.nan, 3.0], dtype=np.float32)
    before = ring.stored()
    ring.add(100.0)
    np.testing.assert_array_equal(ring.stored(), before)  # no stored value was touched
    got = ring.to_array()
    assert got[0] == 101.0 and math.isnan(got[1]) and got[2] == 103.0


def test_a_ring_restored_from_its_stored_values_is_the_same_bit_for_bit():
    rng = np.random.default_rng(5)
    ring = RingBuffer(50, 40.0 + rng.standard_normal(30), dtype=np.float32)
    for v in 40.0 + rng.standard_normal(37):
        ring.append(float(v))
    again = RingBuffer.from_stored(50, ring.stored(), ring.reference, np.float32)
    assert again.to_array().tobytes() == ring.to_array().tobytes()
    ring.append(41.5)
    again.append(41.5)
    assert again.to_array().tobytes() == ring.to_array().tobytes()


def test_a_ring_allocates_at_its_first_value_and_refuses_other_dtypes():
    ring = RingBuffer(2000, dtype=np.float32)
    assert ring._data is None and ring.to_array().size == 0
    ring.append(7.25)
    assert ring._data.nbytes == 2000 * 4 and ring.to_array().tolist() == [7.25]
    with pytest.raises(ValueError, match="float64 or float32"):
        RingBuffer(3, dtype=np.int64)


def test_the_step_history_reads_back_what_a_long_deque_would_give_the_estimate():
    # estimate_level_shift reads at most MAX_RUN_STEPS of a run, the latest: the compact history
    # must give the same rows for every slice the monitor takes
    rng = np.random.default_rng(11)
    long = deque(maxlen=1024)
    short = StepHistory()
    for i in range(1500):
        row = (math.nan if i % 17 == 0 else float(rng.standard_normal()), 1.0 + float(rng.random()), bool(i % 5))
        long.append(row)
        short.append(*row)
        if i % 97 == 0:
            for k in (0, 1, 5, 128, 300):
                want = list(long)[-k:][-MAX_RUN_STEPS:]
                got = short.rows()[-k:][-MAX_RUN_STEPS:]
                assert [tuple(map(repr, r)) for r in got] == [tuple(map(repr, r)) for r in want]
    assert len(short) == MAX_RUN_STEPS


def test_the_on_delay_window_counts_the_last_n_flags_and_round_trips():
    flags = [True, False, True, True, False, False, True]
    window = _OnDelayWindow(4)
    kept = deque(maxlen=4)
    for flag in flags:
        window.append(flag)
        kept.append(flag)
        assert window.hits == sum(kept) and window.to_list() == list(kept)
    again = _OnDelayWindow(4, window.to_list())
    assert again.to_list() == window.to_list() and again.hits == window.hits
    window.clear()
    assert window.hits == 0 and window.to_list() == []


def test_the_noise_burst_statistic_kept_pair_by_pair_equals_the_direct_formula():
    # Q = 1/2 sum of squared successive differences (von Neumann et al. 1941, the mean square
    # successive difference), rebuilt from the window at every step, against the pairs kept
    import random

    from leadline.detector.rules.noise_burst import NoiseBurstRule, successive_difference_statistic

    rule = NoiseBurstRule(24, 1e-4, 1e-3)
    rng = random.Random(3)
    for i in range(5000):
        rule._push(None if rng.random() < 0.15 else rng.gauss(0.0, 1.0))
        valid = [v for v in rule._values if v is not None]
        assert rule.valid == len(valid) and rule.statistic == successive_difference_statistic(valid), i
        if i % 997 == 0:
            rule.reset()


def test_a_ring_that_has_not_taken_its_reference_yet_restores_the_same():
    # all missing so far: the reference comes from the first finite value, after a restore too
    ring = RingBuffer(10, [math.nan, math.nan], dtype=np.float32)
    again = RingBuffer.from_stored(10, ring.stored(), ring.saved_reference, np.float32)
    for v in (123.456789, 124.0):
        ring.append(v)
        again.append(v)
    assert ring.reference == again.reference == 123.456789
    assert again.to_array().tobytes() == ring.to_array().tobytes()
    cleared = RingBuffer(4, dtype=np.float32)
    cleared.append(0.0)
    cleared.clear()
    restored = RingBuffer.from_stored(4, cleared.stored(), cleared.saved_reference, np.float32)
    cleared.append(5.5)
    restored.append(5.5)
    assert restored.reference == cleared.reference == 0.0
