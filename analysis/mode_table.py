"""Per-mode sums of the counted crossings (per direction): what the mode map and the
live estimate are made from (analysis.counter adds each crossing as it is counted)."""
from __future__ import annotations

import numpy as np

from analysis import crossing_kernels as ck


class ModeTable:
    """Per-mode sums (per direction) for the mode map and the estimate."""

    def __init__(self) -> None:
        self.off = 0
        z = np.zeros(0)
        self.cnt = np.zeros((2, 0))
        self.sum = np.zeros((2, 0))
        self.sq = np.zeros((2, 0))
        self.seen = z.copy()
        self.strong = z.copy()        # trusted (non-weak) crossings per mode
        self.hsum = z.copy()
        self.wsum = z.copy()

    def _grow(self, kmin: int, kmax: int) -> None:
        n = self.seen.size
        lo = min(kmin, self.off) if n else kmin
        hi = max(kmax, self.off + n - 1) if n else kmax
        if n and lo == self.off and hi == self.off + n - 1:
            return
        size = hi - lo + 1
        shift = self.off - lo if n else 0

        def grow(a: np.ndarray) -> np.ndarray:
            b = np.zeros(a.shape[:-1] + (size,))
            if n:
                b[..., shift:shift + n] = a
            return b

        self.cnt, self.sum, self.sq = grow(self.cnt), grow(self.sum), grow(self.sq)
        self.seen, self.hsum, self.wsum = grow(self.seen), grow(self.hsum), grow(self.wsum)
        self.strong = grow(self.strong)
        self.off = lo

    def add1(self, k: int, d: int, pos: float, h: float, w: float, reliable: bool) -> None:
        """add() for one crossing, without numpy overhead."""
        if not self.seen.size or not self.off <= k < self.off + self.seen.size:
            self._grow(k, k)
        i = k - self.off
        self.seen[i] += 1.0
        self.hsum[i] += h
        self.wsum[i] += w
        if reliable:
            self.strong[i] += 1.0
            row = 1 if d < 0 else 0
            self.cnt[row, i] += 1.0
            self.sum[row, i] += pos
            self.sq[row, i] += pos * pos

    def add(self, k, d, pos, h, w, reliable) -> None:
        """add1() for each crossing, in order (compiled)."""
        k = np.ascontiguousarray(k, np.int64)
        if k.size == 0:
            return
        self._grow(int(k.min()), int(k.max()))
        ck.table_add(self.off, self.seen, self.hsum, self.wsum, self.strong, self.cnt, self.sum,
                     self.sq, k, np.ascontiguousarray(d, np.int64),
                     np.ascontiguousarray(pos, np.float64), np.ascontiguousarray(h, np.float64),
                     np.ascontiguousarray(w, np.float64), np.ascontiguousarray(reliable, np.bool_))

    def to_state(self) -> dict:
        return {"off": self.off, "cnt": self.cnt.tolist(), "sum": self.sum.tolist(),
                "sq": self.sq.tolist(), "seen": self.seen.tolist(), "strong": self.strong.tolist(),
                "hsum": self.hsum.tolist(),
                "wsum": self.wsum.tolist()}

    @classmethod
    def from_state(cls, st: dict) -> "ModeTable":
        t = cls()
        t.off = int(st["off"])
        t.cnt = np.array(st["cnt"], float).reshape(2, -1)
        t.sum = np.array(st["sum"], float).reshape(2, -1)
        t.sq = np.array(st["sq"], float).reshape(2, -1)
        t.seen = np.array(st["seen"], float)
        t.strong = np.array(st["strong"], float)
        t.hsum = np.array(st["hsum"], float)
        t.wsum = np.array(st["wsum"], float)
        return t
