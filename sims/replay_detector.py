"""A logged sweep played back as if it were the rig: a Stage and a Detector.

The stage keeps the commanded screw position ``s`` and a mechanical position
``x`` with the same backlash rule as ``sims.mechanics``: moving up the screw
pushes the mount (x = max(x, s)), moving down x = min(x, s + b), so the up
direction has no offset. The detector serves the recorded reading at ``x``,
interpolated linearly between recorded positions, from the recording made in
the direction the mount was last pushed (up: recorded at s = x, down: recorded
at s = x - b). Passes in the same direction are averaged per position. A log
with one direction serves that recording both ways.

The dead band ``b`` is ``[detector] backlash_steps`` when given, else the
log summary's ``backlash_steps``, else estimated here from the lag between
the up and down recordings (cross-correlation), else 0.

Rig keys (``[detector] driver = "replay"`` with ``[stage] driver = "replay"``):
``log`` (the run log to play back; relative paths from the working directory)
and ``backlash_steps``.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from drivers.base import DeviceError, LimitError, Reading

REPLAY_STAGE_KEYS: dict[str, Any] = {}
REPLAY_DETECTOR_KEYS: dict[str, Any] = {
    "log": (str, ...),                   # ... = required (daq.rig.REQUIRED)
    "backlash_steps": (float, None),     # None: from the log's summary, else estimated
}
MAX_LAG_STEPS = 2000


class Recording:
    """Mean reading (and spread) per commanded position, for one direction."""

    def __init__(self, positions_steps: np.ndarray, value: np.ndarray, spread: np.ndarray):
        self.positions_steps = np.asarray(positions_steps, dtype=np.float64)
        self.value = np.asarray(value, dtype=np.float64)
        self.spread = np.asarray(spread, dtype=np.float64)

    @property
    def lo(self) -> float:
        return float(self.positions_steps[0])

    @property
    def hi(self) -> float:
        return float(self.positions_steps[-1])

    def at(self, s: float) -> tuple[float, float]:
        p = self.positions_steps
        return float(np.interp(s, p, self.value)), float(np.interp(s, p, self.spread))


class _Accumulator:
    """Per-position sums over a growing integer range (bounded memory for any log)."""

    def __init__(self):
        self.lo = None
        self.sum = self.sum_spread = self.count = np.zeros(0)

    def add(self, pos: np.ndarray, value: np.ndarray, spread: np.ndarray) -> None:
        if pos.size == 0:
            return
        lo, hi = int(pos.min()), int(pos.max())
        if self.lo is None:
            self.lo, self.sum, self.sum_spread, self.count = lo, *(np.zeros(hi - lo + 1) for _ in range(3))
        new_lo, new_hi = min(lo, self.lo), max(hi, self.lo + self.count.size - 1)
        if new_lo < self.lo or new_hi >= self.lo + self.count.size:
            pad_lo, size = self.lo - new_lo, new_hi - new_lo + 1
            grown = []
            for a in (self.sum, self.sum_spread, self.count):
                g = np.zeros(size)
                g[pad_lo:pad_lo + a.size] = a
                grown.append(g)
            self.sum, self.sum_spread, self.count = grown
            self.lo = new_lo
        k = pos - self.lo
        size = self.count.size
        self.sum += np.bincount(k, weights=value, minlength=size)
        self.sum_spread += np.bincount(k, weights=spread, minlength=size)
        self.count += np.bincount(k, minlength=size)

    def recording(self) -> Recording | None:
        if self.lo is None:
            return None
        seen = self.count > 0
        pos = np.flatnonzero(seen) + self.lo
        c = self.count[seen]
        return Recording(pos, self.sum[seen] / c, self.sum_spread[seen] / c)


def estimate_backlash_steps(up: Recording, down: Recording, max_lag_steps: int = MAX_LAG_STEPS) -> float:
    """Lag b >= 0 at which down(s - b) best matches up(s), to a fraction of a step.

    A feature at mechanical position x is recorded at s = x moving up and at
    s = x - b moving down, so the down recording is the up one moved by -b.
    """
    lo, hi = max(up.lo, down.lo), min(up.hi, down.hi)
    if hi - lo < 8:
        return 0.0
    grid = np.arange(np.floor(min(up.lo, down.lo)), np.ceil(max(up.hi, down.hi)) + 1)
    u = np.interp(grid, up.positions_steps, up.value)
    d = np.interp(grid, down.positions_steps, down.value)
    u, d = u - u.mean(), d - d.mean()
    max_lag = int(min(max_lag_steps, (grid.size - 1) // 2))
    n = 1 << int(np.ceil(np.log2(2 * grid.size)))
    # corr[L] = sum_s u[s] * d[s - L], by FFT; lags 0..max_lag only (play is never negative).
    corr = np.fft.irfft(np.fft.rfft(u, n) * np.conj(np.fft.rfft(d, n)), n)[:max_lag + 1]
    # Normalise by the overlap so larger lags are not penalised for fewer terms.
    corr = corr / (grid.size - np.arange(max_lag + 1))
    k = int(np.argmax(corr))
    if 0 < k < max_lag:  # parabola through the peak and its neighbours
        a, b, c = corr[k - 1], corr[k], corr[k + 1]
        den = a - 2 * b + c
        return float(k + (0.5 * (a - c) / den if den < 0 else 0.0))
    return float(k)


class ReplayBench:
    """The recordings of one log, and the shared mechanical state of stage and detector."""

    def __init__(self, recordings: dict[int, Recording], backlash_steps: float, source: str = "",
                 min_steps: int | None = None, max_steps: int | None = None, first_direction: int = 1):
        if not recordings:
            raise DeviceError(f"replay {source}: the log holds no samples")
        self.recordings = recordings
        self.b = float(backlash_steps)
        self.source = source
        self.s: float | None = None
        self.x = 0.0
        self.contact = first_direction if first_direction in recordings else next(iter(recordings))
        self.stage = ReplayStage(self, min_steps, max_steps)
        self.detector = ReplayDetector(self)

    # -- mechanics (the rules of sims.mechanics.Mount, without kicks) ----------
    def move(self, t: int) -> None:
        if self.s is None:  # first move: engaged in the recording's first direction
            self.s = float(t)
            self.x = t + (self.b if self.contact < 0 else 0.0)
            return
        if t > self.s:
            if t > self.x:
                self.x, self.contact = float(t), 1
        elif t < self.s:
            if t + self.b < self.x:
                self.x, self.contact = t + self.b, -1
        self.s = float(t)

    def reading(self) -> Reading:
        if self.s is None:
            raise DeviceError(f"replay {self.source}: read before the stage was moved")
        rec = self.recordings.get(self.contact)
        if rec is not None:
            s_rec = self.x - (self.b if self.contact < 0 else 0.0)
        else:  # one direction only: serve it for both
            d, rec = next(iter(self.recordings.items()))
            s_rec = self.x - (self.b if d < 0 else 0.0)
        slack = abs(self.b) + 1.0
        if not rec.lo - slack <= s_rec <= rec.hi + slack:
            raise DeviceError(f"replay {self.source}: no recorded reading at {self.x:.1f} steps "
                              f"(the log covers {rec.lo:.0f}..{rec.hi:.0f} moving "
                              f"{'up' if self.contact > 0 else 'down'})")
        value, spread = rec.at(s_rec)
        return Reading(value, spread)

    def describe(self) -> str:
        ways = " and ".join("up" if d > 0 else "down" for d in sorted(self.recordings, reverse=True))
        return f"replay of {self.source} ({ways}, backlash {self.b:.1f} steps)"


class ReplayStage:
    name = "replay"

    def __init__(self, bench: ReplayBench, min_steps: int | None, max_steps: int | None):
        self.bench, self.min_steps, self.max_steps = bench, min_steps, max_steps

    def identify(self) -> str:
        return self.bench.describe()

    def position_steps(self) -> int:
        return int(self.bench.s) if self.bench.s is not None else 0

    def move_to(self, target_steps: int) -> None:
        if self.min_steps is not None and target_steps < self.min_steps:
            raise LimitError(f"stage replay: move to {target_steps} refused, below min_steps = {self.min_steps}")
        if self.max_steps is not None and target_steps > self.max_steps:
            raise LimitError(f"stage replay: move to {target_steps} refused, beyond max_steps = {self.max_steps}")
        self.bench.move(int(target_steps))

    def stop(self) -> None:
        pass

    def close(self) -> None:
        pass


class ReplayDetector:
    name = "replay"

    def __init__(self, bench: ReplayBench):
        self.bench = bench

    def identify(self) -> str:
        return self.bench.describe()

    def read(self) -> Reading:
        return self.bench.reading()

    def close(self) -> None:
        pass


# --- building one from a run log ----------------------------------------------

def recordings_from_blocks(blocks) -> tuple[dict[int, Recording], int]:
    """Per-direction recordings from an iterable of sample blocks; also the first direction."""
    acc = {1: _Accumulator(), -1: _Accumulator()}
    first = None
    for b in blocks:
        pos = np.asarray(b.position_steps, dtype=np.int64)
        d = np.asarray(b.direction)
        if first is None and d.size:
            first = 1 if d[0] >= 0 else -1
        for way in (1, -1):
            m = (d >= 0) if way > 0 else (d < 0)
            if m.any():
                acc[way].add(pos[m], np.asarray(b.value)[m], np.asarray(b.spread)[m])
    recs = {way: r for way, a in acc.items() if (r := a.recording()) is not None}
    return recs, first or 1


def bench_from_log(path: str | Path, backlash_steps: float | None = None,
                   min_steps: int | None = None, max_steps: int | None = None) -> ReplayBench:
    # The log format belongs to daq; imported here, when a replay rig is opened.
    from daq.runlog import LogError, RunLog
    try:
        log = RunLog.open(path)
    except LogError as exc:
        raise DeviceError(f"replay: {exc}") from None
    try:
        recs, first = recordings_from_blocks(log.iter_blocks())
        if backlash_steps is None:
            logged = (log.summary() or {}).get("backlash_steps")
            if isinstance(logged, (int, float)) and logged >= 0:
                backlash_steps = float(logged)
            elif len(recs) == 2:
                backlash_steps = estimate_backlash_steps(recs[1], recs[-1])
            else:
                backlash_steps = 0.0
    except LogError as exc:
        raise DeviceError(f"replay: {exc}") from None
    finally:
        log.close()
    return ReplayBench(recs, backlash_steps, str(path), min_steps, max_steps, first)


# The stage and the detector of one rig share one bench: the factory called for
# the stage opens it, the one for the detector (same sections) takes it up.
_opened: list[tuple[dict, ReplayBench]] = []


def _bench_for(sections: dict) -> ReplayBench:
    for secs, bench in _opened:
        if secs is sections:
            return bench
    det, st = sections["detector"], sections["stage"]
    if det.get("driver") != "replay" or st.get("driver") != "replay":
        raise DeviceError("replay: needs both [stage] driver = \"replay\" and [detector] driver = \"replay\"")
    bench = bench_from_log(det["log"], det.get("backlash_steps"), st.get("min_steps"), st.get("max_steps"))
    _opened[:] = [(sections, bench)]
    return bench


def open_replay_stage(sections: dict, bench: Any = None) -> ReplayStage:
    return _bench_for(sections).stage


def open_replay_detector(sections: dict, bench: Any = None) -> ReplayDetector:
    return _bench_for(sections).detector


def check_replay_settings(section: dict) -> list[tuple[str, str]]:
    out = []
    if "log" in section and not Path(section["log"]).is_file():
        out.append(("log", f"no such file: {section['log']}"))
    b = section.get("backlash_steps")
    if b is not None and b < 0:
        out.append(("backlash_steps", "must not be negative"))
    return out
