"""Put timestamped readings on a regular grid of slots.

The model needs one value per slot of a regular grid, NaN for a missing
slot. Readings arrive with timestamps; these rules place them, and every
reading that is not placed as-is is counted:

* **slot**: slot k holds the reading closest to ``origin + k * interval_s``;
  a reading is placed in slot round((t - origin) / interval_s).
* **snapped**: a reading more than 1% of the interval off its slot's time,
  but within ``tolerance`` (default 0.25 of the interval), is placed and
  counted as snapped.
* **off_grid**: a reading further than ``tolerance`` from every slot time is
  dropped and counted; it does not belong to any slot.
* **duplicate**: a second reading for a slot that already has one is
  dropped and counted; the first one is kept (nothing accepted is replaced).
* **out_of_order**: a reading for a slot before the latest placed one is
  dropped and counted; the model has moved past it.
* **missing**: a slot with no reading becomes NaN (predict only).

The interval, when not given, is the median spacing of the timestamps.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .errors import DataError

SNAP_NOTICE_FRACTION = 0.01


@dataclass
class GridCounts:
    """How the readings were placed (see the module docstring)."""

    placed: int = 0
    snapped: int = 0
    off_grid: int = 0
    duplicate: int = 0
    out_of_order: int = 0
    missing: int = 0

    def as_dict(self) -> dict[str, int]:
        return dict(self.__dict__)


@dataclass
class GridSeries:
    """Values on a regular grid, slot k at ``origin_epoch_s + k * interval_s``."""

    origin_epoch_s: float
    interval_s: float
    values: np.ndarray
    counts: GridCounts = field(default_factory=GridCounts)

    @property
    def epoch_s(self) -> np.ndarray:
        """The slots' times in epoch seconds."""
        return self.origin_epoch_s + self.interval_s * np.arange(self.values.size)


def infer_interval_s(epoch_s: np.ndarray) -> float:
    """The median positive spacing of the timestamps."""
    diffs = np.diff(np.asarray(epoch_s, dtype=float))
    diffs = diffs[diffs > 0]
    if diffs.size == 0:
        raise DataError("cannot infer the interval: need at least two distinct timestamps")
    return float(np.median(diffs))


def grid_origin(epochs: np.ndarray, interval_s: float) -> float:
    """The earliest time, moved to the median phase of all timestamps on the grid."""
    t0 = float(epochs.min())
    phase = np.mod(epochs - t0 + interval_s / 2.0, interval_s) - interval_s / 2.0
    return t0 + float(np.median(phase))


class GridCursor:
    """Places readings one at a time, as a live feed delivers them.

    Parameters
    ----------
    origin_epoch_s : float
        Time of slot 0.
    interval_s : float
        Nominal interval between readings.
    tolerance : float
        Largest distance from a slot's time, as a fraction of the interval,
        at which a reading still belongs to the slot (0 < tolerance <= 0.5).
    next_slot : int
        The first slot not yet filled.
    """

    def __init__(self, origin_epoch_s: float, interval_s: float, tolerance: float = 0.25, next_slot: int = 0):
        if not interval_s > 0:
            raise DataError(f"interval_s must be positive, got {interval_s}")
        if not 0 < tolerance <= 0.5:
            raise DataError(f"tolerance must be in (0, 0.5], got {tolerance}")
        self.origin_epoch_s = float(origin_epoch_s)
        self.interval_s = float(interval_s)
        self.tolerance = float(tolerance)
        self.next_slot = int(next_slot)
        self.counts = GridCounts()

    def slot_time(self, slot: int) -> float:
        return self.origin_epoch_s + slot * self.interval_s

    def place(self, epoch_s: float) -> int | None:
        """The slot for a reading at ``epoch_s``, or None when it is dropped.

        After a placed reading, ``next_slot`` is the slot after it; slots
        skipped on the way are the caller's missing slots.
        """
        position = (epoch_s - self.origin_epoch_s) / self.interval_s
        slot = int(np.floor(position + 0.5))
        offset = abs(position - slot)
        if offset > self.tolerance:
            self.counts.off_grid += 1
            return None
        if slot < self.next_slot:
            if slot == self.next_slot - 1:
                self.counts.duplicate += 1
            else:
                self.counts.out_of_order += 1
            return None
        if offset > SNAP_NOTICE_FRACTION:
            self.counts.snapped += 1
        self.counts.missing += slot - self.next_slot
        self.counts.placed += 1
        self.next_slot = slot + 1
        return slot

    def place_sorted(self, epoch_s: np.ndarray) -> np.ndarray:
        """:meth:`place` for many readings in time order at once: their slots (-1 for a dropped
        one), with the counts and ``next_slot`` as placing them one by one leaves them."""
        slot, offset = self._run_offsets(epoch_s)
        on_grid = offset <= self.tolerance
        # next_slot - 1 before each reading: the largest on-grid slot before it (the input is sorted)
        before = np.maximum.accumulate(np.concatenate([[self.next_slot - 1.0], np.where(on_grid, slot, -np.inf)[:-1]]))
        placed = on_grid & (slot > before)
        kept = on_grid & ~placed
        c = self.counts
        c.off_grid += int(np.count_nonzero(~on_grid))
        c.duplicate += int(np.count_nonzero(kept & (slot == before)))
        c.out_of_order += int(np.count_nonzero(kept & (slot != before)))
        c.snapped += int(np.count_nonzero(placed & (offset > SNAP_NOTICE_FRACTION)))
        c.missing += int(np.sum(slot[placed] - before[placed] - 1.0))
        c.placed += int(np.count_nonzero(placed))
        if placed.any():
            self.next_slot = int(slot[placed][-1]) + 1
        return np.where(placed, slot, -1).astype(np.int64)

    def _run_offsets(self, epoch_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        position = (np.asarray(epoch_s, dtype=float) - self.origin_epoch_s) / self.interval_s
        slot = np.floor(position + 0.5)
        return slot, np.abs(position - slot)

    def run_length(self, epoch_s: np.ndarray) -> int:
        """How many of ``epoch_s`` (in order) would fill the next slots one after another, each
        within the tolerance, as :meth:`place` would place them. Nothing is placed."""
        slot, offset = self._run_offsets(epoch_s)
        fits = (offset <= self.tolerance) & (slot == self.next_slot + np.arange(slot.size))
        return int(slot.size if fits.all() else np.argmin(fits))

    def place_run(self, epoch_s: np.ndarray) -> None:
        """Place readings that :meth:`run_length` found to fill the next slots: the counts and
        ``next_slot`` as :meth:`place` one by one leaves them."""
        _, offset = self._run_offsets(epoch_s)
        self.counts.snapped += int(np.count_nonzero(offset > SNAP_NOTICE_FRACTION))
        self.counts.placed += int(offset.size)
        self.next_slot += int(offset.size)


def to_grid(epoch_s, values, interval_s: float | None = None, origin_epoch_s: float | None = None,
            tolerance: float = 0.25) -> GridSeries:
    """Place a batch of readings on a grid, in the order given.

    Parameters
    ----------
    epoch_s, values : array_like
        Timestamps in epoch seconds and readings, the same length.
    interval_s : float, optional
        Nominal interval; inferred (median spacing) when omitted.
    origin_epoch_s : float, optional
        Time of slot 0; the first timestamp when omitted.
    """
    t = np.asarray(epoch_s, dtype=float)
    v = np.asarray(values, dtype=float)
    if t.shape != v.shape or t.ndim != 1:
        raise DataError(f"timestamps and values must be 1-D and of one length, got {t.shape} and {v.shape}")
    if t.size == 0:
        raise DataError("no readings")
    if interval_s is None:
        interval_s = infer_interval_s(t)
    cursor = GridCursor(t[0] if origin_epoch_s is None else origin_epoch_s, interval_s, tolerance)
    slots = np.full(t.size, -1, dtype=np.int64)
    for i, ts in enumerate(t):
        slot = cursor.place(float(ts))
        if slot is not None:
            slots[i] = slot
    keep = slots >= 0
    grid = np.full(cursor.next_slot, np.nan)
    grid[slots[keep]] = v[keep]
    return GridSeries(cursor.origin_epoch_s, float(interval_s), grid, cursor.counts)
