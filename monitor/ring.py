"""Fixed-capacity ring buffers of numpy rows: memory is set at creation, whatever the session length."""

from __future__ import annotations

import numpy as np


class RingBuffer:
    """The last ``capacity`` rows of shape ``row_shape``; appends are batched numpy copies."""

    def __init__(self, capacity: int, row_shape: tuple[int, ...] = (), dtype=np.float64):
        if capacity < 1:
            raise ValueError(f"capacity={capacity} must be at least 1")
        self.capacity = int(capacity)
        self._data = np.zeros((self.capacity, *row_shape), dtype=dtype)
        self._next = 0  # total rows ever appended
        self.row_shape = row_shape

    def __len__(self) -> int:
        return min(self._next, self.capacity)

    @property
    def total(self) -> int:
        """Rows appended since creation (including those overwritten)."""
        return self._next

    def append(self, rows: np.ndarray) -> None:
        rows = np.asarray(rows)
        if rows.shape[1:] != self.row_shape:
            rows = rows.reshape((-1, *self.row_shape))
        n = rows.shape[0]
        if n == 0:
            return
        if n >= self.capacity:
            self._data[:] = rows[-self.capacity :]
            self._next += n
            # rotate so that the oldest row sits where the next write would go
            shift = self._next % self.capacity
            self._data[:] = np.roll(self._data, shift, axis=0)
            return
        start = self._next % self.capacity
        end = start + n
        if end <= self.capacity:
            self._data[start:end] = rows
        else:
            k = self.capacity - start
            self._data[start:] = rows[:k]
            self._data[: n - k] = rows[k:]
        self._next += n

    def last(self, n: int | None = None) -> np.ndarray:
        """A copy of the newest ``n`` rows (all held rows by default), oldest first."""
        held = len(self)
        n = held if n is None else min(int(n), held)
        if n <= 0:
            return self._data[:0].copy()
        end = self._next % self.capacity
        start = end - n
        if start >= 0:
            return self._data[start:end].copy()
        return np.concatenate([self._data[start:], self._data[:end]])

    def clear(self) -> None:
        self._next = 0
