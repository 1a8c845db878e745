""""auto" looks for daily and weekly cycles itself, and keeps them only where AICc says so."""

from __future__ import annotations

import numpy as np
import pytest

from leadline.detector.fitting import fit
from leadline.detector.harmonic_selection import cycles_to_try, screen_cycles
from leadline.detector.seasonality import DAY_S, WEEK_S
from leadline.detector.simulate import simulate_arima

START = 1_780_000_000.0  # 2026-05-28T20:26:40Z
DAYS = 10


def feed(seed: int, amplitude: float):
    """An invented 15-minute feed: AR(1) noise (phi 0.6, sd 0.5) plus a daily sine of ``amplitude``."""
    n = DAYS * 96
    epoch = START + 900.0 * np.arange(n)
    y = 40.0 + simulate_arima(n, ar=[0.6], sigma=0.5, seed=seed) + amplitude * np.sin(2 * np.pi * epoch / DAY_S)
    return epoch, y


@pytest.fixture(scope="module")
def without_cycle():
    epoch, y = feed(seed=31, amplitude=0.0)
    return fit(y, "auto", timestamps_epoch_s=epoch)


@pytest.fixture(scope="module")
def with_cycle():
    epoch, y = feed(seed=31, amplitude=1.0)
    return fit(y, "auto", timestamps_epoch_s=epoch)


def test_a_feed_without_a_cycle_gains_no_calendar_terms(without_cycle):
    model = without_cycle
    assert model.calendar is None
    assert model.spec.order[:2] in ((1, 0), (2, 0)) and model.spec.trend == "c"
    assert "looked for daily cycles" in model.selection.reason
    assert model.description == model.spec.label


def test_a_feed_with_a_daily_sine_gains_the_daily_cycle(with_cycle):
    model = with_cycle
    assert model.calendar is not None and model.calendar.has_period(DAY_S)
    assert not model.calendar.has_period(WEEK_S)
    assert model.description.startswith("daily cycle, ") and model.spec.label in model.description
    # The same table holds the orders with and without the cycle, each with its AICc.
    labels = [c.label for c in model.selection.candidates]
    assert any("+ daily cycle" in label for label in labels)
    assert any("cycle" not in label for label in labels)
    ok = [c for c in model.selection.candidates if c.status == "ok"]
    assert model.aicc == min(c.aicc for c in ok)
    assert any("cycle" not in c.label and c.aicc > model.aicc for c in ok)
    # The daily sine's amplitude comes back from the fitted terms: sqrt(sin^2 + cos^2) of harmonic 1.
    terms = model.summary()["calendar_terms"]
    amplitude = np.hypot(terms["sin(1d,1)"], terms["cos(1d,1)"])
    assert amplitude == pytest.approx(1.0, abs=0.15)


def test_cycles_are_tried_only_where_the_window_holds_two_of_them():
    assert cycles_to_try(96 * 13, 900.0) == (DAY_S,)
    assert cycles_to_try(96 * 14, 900.0) == (DAY_S, WEEK_S)
    assert cycles_to_try(96 * 1, 900.0) == ()
    assert cycles_to_try(400, DAY_S) == ()  # daily readings have no daily cycle to find
    assert cycles_to_try(400, None) == ()


def test_screen_proposes_nothing_for_most_feeds_without_a_cycle():
    # 20 seeded AR(1) feeds without a cycle: the screen proposes a cycle for none of them here.
    epoch = START + 900.0 * np.arange(14 * 96)
    proposed = sum(screen_cycles(40 + simulate_arima(epoch.size, ar=[0.6], sigma=0.5, seed=s), epoch, 900.0)[0]
                   is not None for s in range(100, 120))
    assert proposed <= 1


def test_auto_without_timestamps_or_with_find_cycles_off_looks_for_none():
    epoch, y = feed(seed=31, amplitude=1.0)
    model = fit(y[:400], "auto", timestamps_epoch_s=epoch[:400], find_cycles=False)
    assert model.calendar is None and "cycle_screen" not in model.selection.extra
