"""A fixed ring of floats in one numpy array: the refit window and the diagnostics window.

A watched feed keeps two long windows of numbers: its refit window
(``refit_window_points`` model values, :mod:`.refit`) and the innovations
of its diagnostics (:mod:`.diagnostics`). Held as Python lists or deques
they cost about 32 bytes a value; here they cost 8 (float64) or 4
(float32). The array is allocated at the first value, so a feed that never
fills a window does not pay for it.

Notes
-----
A float32 ring stores each value as its departure from a reference r (the
mean of the first values it was given, in float64):

.. math::

    \\tilde x_i = \\operatorname{fl}_{32}(x_i - r), \\qquad x_i \\approx r + \\tilde x_i,

so the rounding error is at most 2^{-24} |x_i - r| (IEEE 754 single
precision), relative to the feed's own spread, not to its level: a reading
of 1e6 +/- 10 keeps about seven digits of the +/- 10. Adding a constant to
every value (:meth:`RingBuffer.add`) moves r and touches no stored value.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

__all__ = ["RingBuffer"]


class RingBuffer:
    """The last ``capacity`` floats, oldest first when read (module docstring).

    Parameters
    ----------
    capacity : int
    values : array_like, optional
        Values to start with, oldest first; only the last ``capacity`` are kept.
    dtype : {numpy.float64, numpy.float32}
        Storage; float32 stores departures from the reference.
    reference : float, optional
        The reference r of a float32 ring (default: the mean of the finite
        ``values``, or the first finite value appended).
    """

    __slots__ = ("_capacity", "_dtype", "_data", "_start", "_len", "reference", "_anchored")

    def __init__(self, capacity: int, values: Any = (), dtype: Any = np.float64,
                 reference: float | None = None) -> None:
        self._capacity = int(capacity)
        if self._capacity < 1:
            raise ValueError(f"RingBuffer capacity must be >= 1, got {capacity!r}")
        self._dtype = np.dtype(dtype)
        if self._dtype not in (np.dtype(np.float64), np.dtype(np.float32)):
            raise ValueError(f"RingBuffer dtype must be float64 or float32, got {self._dtype}")
        self._data: np.ndarray | None = None
        self._start = 0
        self._len = 0
        self.reference = 0.0 if reference is None else float(reference)
        # a float32 ring takes its reference from its first values unless one was given
        self._anchored = reference is not None or self._dtype == np.float64
        first = np.asarray(values, dtype=float).ravel()[-self._capacity:]
        if first.size:
            if not self._anchored:
                finite = first[np.isfinite(first)]
                if finite.size:
                    self.reference = float(finite.mean())
                    self._anchored = True
            self._allocate()
            self._data[:first.size] = first - self.reference
            self._len = int(first.size)

    def _allocate(self) -> None:
        self._data = np.full(self._capacity, np.nan, dtype=self._dtype)

    @property
    def saved_reference(self) -> float | None:
        """The reference to save with :meth:`stored` (None while a float32 ring has not taken one yet)."""
        return self.reference if self._anchored else None

    @property
    def capacity(self) -> int:
        return self._capacity

    @property
    def dtype(self) -> np.dtype:
        return self._dtype

    def __len__(self) -> int:
        return self._len

    def append(self, value: float) -> None:
        """Keep one value, dropping the oldest when full."""
        if not self._anchored and math.isfinite(value):
            self.reference = float(value)
            self._anchored = True
        if self._data is None:
            self._allocate()
        cap = self._capacity
        if self._len < cap:
            self._data[(self._start + self._len) % cap] = value - self.reference
            self._len += 1
        else:
            self._data[self._start] = value - self.reference
            self._start = (self._start + 1) % cap

    def extend(self, values: Any) -> None:
        """Keep many values, oldest first: the same stored values as :meth:`append` one by one.

        Each value is stored as ``value - reference`` computed in float64 and
        then cast to the ring's dtype, exactly as :meth:`append` does.
        """
        x = np.asarray(values, dtype=float).ravel()
        if x.size == 0:
            return
        if not self._anchored:
            finite = np.flatnonzero(np.isfinite(x))
            if finite.size == 0 or finite[0] > 0:
                # values before the first finite one are stored against no reference, as append does
                head = x if finite.size == 0 else x[:finite[0]]
                for value in head.tolist():
                    self.append(value)
                if finite.size == 0:
                    return
                x = x[finite[0]:]
            self.reference = float(x[0])
            self._anchored = True
        if self._data is None:
            self._allocate()
        cap = self._capacity
        if x.size >= cap:
            self._data[:] = x[-cap:] - self.reference
            self._start, self._len = 0, cap
            return
        stored = x - self.reference
        first = (self._start + self._len) % cap
        room = min(stored.size, cap - first)
        self._data[first:first + room] = stored[:room]
        self._data[:stored.size - room] = stored[room:]
        overflow = max(self._len + stored.size - cap, 0)
        self._len = min(self._len + stored.size, cap)
        self._start = (self._start + overflow) % cap

    def stored(self) -> np.ndarray:
        """The stored values (departures from the reference), oldest first, in the ring's dtype (a copy)."""
        if self._data is None or self._len == 0:
            return np.empty(0, dtype=self._dtype)
        end = self._start + self._len
        if end <= self._capacity:
            return self._data[self._start:end].copy()
        return np.concatenate((self._data[self._start:], self._data[:end - self._capacity]))

    def to_array(self) -> np.ndarray:
        """The values, oldest first, as float64 (a copy)."""
        values = self.stored().astype(np.float64)
        if self.reference != 0.0:
            values += self.reference
        return values

    def add(self, constant: float) -> None:
        """Add ``constant`` to every value (NaN stays NaN)."""
        if self._dtype == np.float32:
            self.reference += float(constant)
        elif self._data is not None:
            self._data += constant

    def clear(self) -> None:
        """Forget every value (the array is kept)."""
        self._start = 0
        self._len = 0

    @classmethod
    def from_stored(cls, capacity: int, stored: Any, reference: float | None, dtype: Any) -> "RingBuffer":
        """A ring holding :meth:`stored` values again, bit for bit (a checkpoint's restore).

        ``reference`` is :attr:`saved_reference`: None restores a ring that has not taken one yet.
        """
        ring = cls(capacity, dtype=dtype, reference=reference)
        data = np.asarray(stored, dtype=ring._dtype).ravel()[-ring._capacity:]
        if data.size:
            ring._allocate()
            ring._data[:data.size] = data
            ring._len = int(data.size)
        return ring
