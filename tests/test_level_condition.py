"""LevelCondition: the departure from the level before an episode, on readings."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from leadline.detector.errors import RuleError, StateFormatError
from leadline.detector.rules.level_condition import LevelCondition


def _feed(cond: LevelCondition, values) -> list[bool]:
    held = []
    for v in values:
        cond.observe(float(v))
        held.append(cond.holds())
    return held


def test_a_step_holds_while_it_lasts_and_clears_soon_after():
    rng = np.random.default_rng(11)
    clean = rng.normal(100.0, 1.0, 300)
    cond = LevelCondition()
    _feed(cond, clean)
    step = rng.normal(104.0, 1.0, 200)
    back = rng.normal(100.0, 1.0, 40)
    cond.start(run_steps=0)
    held = _feed(cond, step)
    assert np.mean(held) >= 0.95
    after = _feed(cond, back)
    assert cond.returned()
    assert after.index(False) <= 8  # back within the current level's window


def test_noise_alone_never_establishes_a_condition():
    rng = np.random.default_rng(12)
    cond = LevelCondition()
    _feed(cond, rng.normal(0.0, 1.0, 200))
    cond.start(run_steps=3)
    held = _feed(cond, rng.normal(0.0, 1.0, 300))
    assert not any(held)
    assert not cond.established


def test_level_before_comes_from_the_readings_before_the_run():
    cond = LevelCondition(current_readings=4, before_readings=10)
    _feed(cond, [5.0] * 30 + [9.0] * 6)
    cond.start(run_steps=6)
    assert cond.level_before == 5.0
    assert cond.departure == 4.0
    assert cond.holds()


def test_nile_after_1898_stays_away_from_the_level_before():
    # Nile annual flow (statsmodels' nile data set); the change point of 1898 is
    # Cobb (1978), Biometrika 65(2), "The problem of the Nile". The flow before it
    # averages about 1,100 and after it about 850 (1e8 m^3).
    nile = sm.datasets.nile.load_pandas().data
    years = nile["year"].astype(int).to_numpy()
    flow = nile["volume"].to_numpy(dtype=float)
    cond = LevelCondition()
    before = flow[years < 1899]
    _feed(cond, before)
    cond.start(run_steps=0)
    held = _feed(cond, flow[years >= 1899])
    assert cond.level_before == pytest.approx(np.median(before[-24:]))
    assert cond.level_before > 1000
    assert all(held[8:])  # once the current median has left the old level, to the end of the series


def test_state_round_trip_and_version_check():
    rng = np.random.default_rng(13)
    a = LevelCondition()
    _feed(a, rng.normal(0, 1, 50))
    a.start(2)
    _feed(a, rng.normal(5, 1, 10))
    b = LevelCondition()
    b.load_state(a.state_dict())
    assert b.state_dict() == a.state_dict()
    for v in rng.normal(5, 1, 5):
        a.observe(v)
        b.observe(v)
        assert a.holds() == b.holds() and a.departure == b.departure
    with pytest.raises(StateFormatError, match="version"):
        b.load_state({"v": 99})


def test_bad_settings_name_the_setting():
    with pytest.raises(RuleError, match="return_fraction"):
        LevelCondition(return_fraction=1.5)
    with pytest.raises(RuleError, match="current_readings"):
        LevelCondition(current_readings=0)


def test_the_current_level_is_numpys_median_of_the_last_readings():
    # numpy.median is the reference: the middle value, or the mean of the middle two, of the last
    # current_readings readings kept; ties, quantized and wrapped rings included
    rng = np.random.default_rng(23)
    for _ in range(400):
        current = int(rng.integers(1, 16))
        capacity = current + 2 + int(rng.integers(1, 30))
        cond = LevelCondition(current_readings=current, before_readings=2, capacity=capacity)
        values = np.round(rng.standard_normal(int(rng.integers(1, 120))) * rng.choice([1e-3, 1.0, 1e6]),
                          int(rng.integers(0, 4)))
        for value in values:
            cond.observe(float(value))
        assert cond._current_level() == float(np.median(values[-current:]))
