"""RepeatHabits: how often a feed repeated its readings in training."""

from __future__ import annotations

import numpy as np
import pytest

from leadline.detector.errors import StateFormatError
from leadline.detector.rules.repeat_habits import (MAX_PROBABILITY, PRIOR_WEIGHT, RepeatHabits,
                                                    learn_repeat_habits)


def test_counts_by_hand():
    y = [1, 1, 1, 2, 2, 3, 1, 1, np.nan, 1, 1]
    h = learn_repeat_habits(np.repeat(y, 1), 0.0)
    # predecessors 1: (1,1),(1,1),(1,2),(1,1),(1,1) -> o=5, r=4 (the NaN breaks two pairs)
    r, o, run = h.values[1.0]
    assert (r, o) == (4, 5)
    assert run == 2
    # 2 and 3 are held fewer than 5 times: pooled, 1 repeat in 3 predecessors
    assert h.pooled_rate == pytest.approx(1 / 3)
    assert h.probability(1.0) == pytest.approx((4 + PRIOR_WEIGHT / 3) / (5 + PRIOR_WEIGHT))
    assert h.probability(7.0) == pytest.approx(1 / 3)


def test_a_flow_parked_at_a_set_point_is_habitual_and_a_rare_value_is_not():
    rng = np.random.default_rng(21)
    parked = np.where(rng.random(3000) < 0.7, 32.0, np.round(rng.normal(32, 2, 3000)))
    h = learn_repeat_habits(parked)
    assert h.probability(32.0) > 0.5
    assert h.probability(41.0) < h.probability(32.0)
    assert h.longest_run(32.0) >= 10


def test_cap_keeps_every_run_reportable():
    h = learn_repeat_habits([5.0] * 500)
    assert h.probability(5.0) == MAX_PROBABILITY


def test_json_round_trip_and_version():
    h = learn_repeat_habits(np.round(np.random.default_rng(3).normal(0, 1, 500)), 0.0)
    assert RepeatHabits.from_json(h.to_json()) == h
    with pytest.raises(StateFormatError, match="version"):
        RepeatHabits.from_json({"v": 7})


def _inn(value, forecast=32.9, std=0.1):
    from leadline.detector.innovation import Innovation
    return Innovation(0, value, forecast, value - forecast, std * std, (value - forecast) / std,
                      forecast - 2 * std, forecast + 2 * std, 0.95, True)


def test_flatline_on_a_parked_flow_waits_for_its_habits_and_still_finds_a_rare_value_frozen():
    from leadline.detector.rules.flatline import FlatlineRule
    rng = np.random.default_rng(22)
    parked = np.where(rng.random(3000) < 0.7, 32.0, np.round(rng.normal(32, 2, 3000)))
    habits = learn_repeat_habits(parked)
    with_habits = FlatlineRule(0.0, 1.0, 1e-6, habits=habits)
    model_only = FlatlineRule(0.0, 1.0, 1e-6)

    def run_length_to_alarm(rule, value, forecast=32.9, std=0.1):
        rule.reset()
        for n in range(1, 2000):
            if rule.assess(_inn(value, forecast, std)).severity is not None:
                return n
        return None

    # the model alone (a tight forecast off the set point) calls a few repeats of 32 a flatline
    assert run_length_to_alarm(model_only, 32.0) <= 3
    # with the habits, 32 repeats as usual: no alarm before its longest training run
    assert run_length_to_alarm(with_habits, 32.0) > habits.longest_run(32.0)
    # a value seldom held, frozen, is still found within a few dozen readings
    # (the model, following the frozen value, forecasts it with a spread of one unit)
    assert run_length_to_alarm(with_habits, 44.0, forecast=44.0, std=1.0) <= 40
