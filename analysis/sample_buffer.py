"""The counter's sample store: a growable 1-d array that appends in place and drops
from the front without copying (analysis.counter keeps samples, positions and
directions in three of them, in step)."""
from __future__ import annotations

import numpy as np


class SampleBuffer:
    """A growable 1-d array: appends in place, drops from the front without copying."""

    def __init__(self, dtype, data=None):
        self.dtype = dtype
        self.arr = np.zeros(4096, dtype)
        self.lo = self.hi = 0
        if data is not None:
            self.extend(np.asarray(data, dtype))

    def extend(self, v: np.ndarray) -> None:
        n = v.size
        if self.hi + n > self.arr.size:
            live = self.hi - self.lo
            cap = self.arr.size
            while cap < 2 * (live + n):
                cap *= 2
            new = np.empty(cap, self.dtype) if cap != self.arr.size or self.lo < live else self.arr
            new[:live] = self.arr[self.lo:self.hi]
            self.arr, self.lo, self.hi = new, 0, live
        self.arr[self.hi:self.hi + n] = v
        self.hi += n

    def drop(self, k: int) -> None:
        self.lo += k

    def make_room(self, n: int) -> None:
        """Move the live samples to the front if fewer than n free places are left:
        done right after a trim, it copies few samples, not a whole batch."""
        if self.hi + n > self.arr.size and self.hi - self.lo + n <= self.arr.size:
            live = self.hi - self.lo
            self.arr[:live] = self.arr[self.lo:self.hi]
            self.lo, self.hi = 0, live

    @property
    def a(self) -> np.ndarray:
        return self.arr[self.lo:self.hi]
