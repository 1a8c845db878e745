"""The recent steps of the stream, kept compactly for the re-anchoring estimate.

:func:`~.level_shift.estimate_level_shift` reads at most
:data:`~.level_shift.MAX_RUN_STEPS` steps of a run, the latest ones, so the
monitor keeps exactly that many: (z_t, sqrt(F_t), absorbed) of each step,
in three fixed numpy arrays used as a ring (17 bytes a step, about 2 KiB in
all), not as Python tuples (about 110 bytes a step).

The values are float64, as the stream produced them: the rows read back are
the same floats that went in, so the estimate is unchanged by the storage.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Any

import numpy as np

from .level_shift import MAX_RUN_STEPS

__all__ = ["StepHistory"]


class StepHistory:
    """The last ``capacity`` steps (z, std, absorbed), oldest first when read.

    Parameters
    ----------
    capacity : int
        Steps kept (default :data:`~.level_shift.MAX_RUN_STEPS`, all the
        estimate can use).
    rows : iterable of (z, std, absorbed), or an ``(n, 3)`` array, optional
        Steps to start with, oldest first; only the last ``capacity`` are kept.
    """

    __slots__ = ("_z", "_std", "_absorbed", "_next", "_len")

    def __init__(self, capacity: int = MAX_RUN_STEPS, rows: Iterable[Any] = ()) -> None:
        capacity = int(capacity)
        if capacity < 1:
            raise ValueError(f"StepHistory capacity must be >= 1, got {capacity}")
        self._z = np.full(capacity, np.nan)
        self._std = np.full(capacity, np.nan)
        self._absorbed = np.zeros(capacity, dtype=bool)
        self._next = 0
        self._len = 0
        if isinstance(rows, np.ndarray):
            self.extend_table(rows)
            return
        for row in rows:
            self.append(*_row(row))

    @property
    def capacity(self) -> int:
        return self._z.size

    def __len__(self) -> int:
        return self._len

    def append(self, z: float, std: float, absorbed: bool) -> None:
        """Keep one step, dropping the oldest when full."""
        i = self._next
        self._z[i] = z
        self._std[i] = std
        self._absorbed[i] = absorbed
        self._next = (i + 1) % self._z.size
        if self._len < self._z.size:
            self._len += 1

    def extend(self, z: Any, std: Any, absorbed: bool) -> None:
        """Keep many steps, oldest first (``std`` and ``absorbed`` may be one value for all)."""
        z = np.asarray(z, dtype=float).ravel()
        n = z.size
        if n == 0:
            return
        std = np.broadcast_to(np.asarray(std, dtype=float), (n,))
        flags = np.broadcast_to(np.asarray(absorbed, dtype=bool), (n,))
        cap = self._z.size
        if n > cap:
            z, std, flags, n = z[-cap:], std[-cap:], flags[-cap:], cap
        index = (self._next + np.arange(n)) % cap
        self._z[index] = z
        self._std[index] = std
        self._absorbed[index] = flags
        self._next = (self._next + n) % cap
        self._len = min(self._len + n, cap)

    def table(self) -> np.ndarray:
        """The steps kept, oldest first, as an ``(n, 3)`` float array: z, std, absorbed (1.0 or 0.0)."""
        order = self._order()
        return np.column_stack([self._z[order], self._std[order], self._absorbed[order]]).astype(float)

    def extend_table(self, table: Any) -> None:
        """Keep the rows of a :meth:`table`, oldest first."""
        table = np.asarray(table, dtype=float).reshape(-1, 3)
        self.extend(table[:, 0], table[:, 1], table[:, 2] != 0.0)

    def _order(self) -> np.ndarray:
        cap = self._z.size
        start = (self._next - self._len) % cap
        return (np.arange(self._len) + start) % cap

    def rows(self) -> list[tuple[float, float, bool]]:
        """The steps kept, oldest first, as ``(z, std, absorbed)`` tuples of Python floats and bools."""
        order = self._order()
        return list(zip(self._z[order].tolist(), self._std[order].tolist(), self._absorbed[order].tolist()))


def _row(row: Any) -> tuple[float, float, bool]:
    """One saved row (JSON nulls for NaN) as (z, std, absorbed)."""
    z, std, absorbed = row
    return (math.nan if z is None else float(z), math.nan if std is None else float(std), bool(absorbed))
