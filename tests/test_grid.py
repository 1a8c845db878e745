"""Placing timestamped readings on a regular grid: each stated rule, counted."""

import numpy as np
import pytest

from leadline.detector.errors import DataError
from leadline.detector.grid import GridCursor, infer_interval_s, to_grid


def test_regular_readings_fill_the_grid():
    t = 1_700_000_000 + 900.0 * np.arange(10)
    grid = to_grid(t, np.arange(10.0))
    assert grid.interval_s == 900.0
    assert grid.values.tolist() == list(np.arange(10.0))
    assert grid.counts.as_dict() == dict(placed=10, snapped=0, off_grid=0, duplicate=0, out_of_order=0, missing=0)


def test_each_rule_is_applied_and_counted():
    base = 1_700_000_000.0
    t = [base, base + 900, base + 1800 + 120, base + 2700 + 400, base + 2700, base + 900, base + 5400]
    v = [1.0, 2.0, 3.0, 99.0, 4.0, 98.0, 6.0]
    grid = to_grid(t, v, interval_s=900.0)
    # slot 2 snapped (120 s off), 400 s off is off-grid, slot 3 fine, slot 1 again is out of
    # order, slots 4 is missing, slot 6 placed.
    assert grid.values[:4].tolist() == [1.0, 2.0, 3.0, 4.0]
    assert np.isnan(grid.values[4]) and np.isnan(grid.values[5]) and grid.values[6] == 6.0
    assert grid.counts.as_dict() == dict(placed=5, snapped=1, off_grid=1, duplicate=0, out_of_order=1, missing=2)


def test_a_second_reading_for_a_slot_keeps_the_first():
    cursor = GridCursor(0.0, 60.0)
    assert cursor.place(60.0) == 1
    assert cursor.place(65.0) is None
    assert cursor.counts.duplicate == 1 and cursor.counts.missing == 1


def test_interval_is_the_median_spacing_and_bad_input_is_refused():
    assert infer_interval_s([0, 60, 120, 300, 360]) == 60.0
    with pytest.raises(DataError, match="two distinct timestamps"):
        infer_interval_s([5.0, 5.0])
    with pytest.raises(DataError, match="tolerance"):
        GridCursor(0.0, 60.0, tolerance=0.7)
