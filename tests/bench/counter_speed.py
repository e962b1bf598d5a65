"""Speed of the streaming counter against scipy.signal.find_peaks (not part of the test run).

    /work/venv/bin/python tests/bench/counter_speed.py [--samples N] [--chunk N] [--repeat K] [--json]

Makes its own trace (up and down passes over a comb of Lorentzian blips, with
backlash, white noise and a slow drift), feeds it to StreamCounter in chunks
as a live run would, and times find_peaks(prominence=..., distance=...) on the
same trace. Two blip densities: a step-mode sweep (one read per step, 60 steps
per mode) and a fast detector (10 reads per step, 120 steps per mode).
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np
from scipy.signal import find_peaks

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
from analysis.counter import StreamCounter  # noqa: E402


def make_trace(n: int, spacing_steps: float, reads_per_step: int, seed: int = 1):
    """Commanded positions, directions and values: passes of 100 modes, up and down."""
    rng = np.random.default_rng(seed)
    span = int(100 * spacing_steps)
    leg = np.arange(span + 1, dtype=float)
    one = np.concatenate((leg, leg[::-1][1:]))
    steps = np.tile(one, -(-n // (one.size * reads_per_step)) + 1)
    pos = np.repeat(steps, reads_per_step)[:n] + 10_000.0
    d = np.sign(np.diff(pos, prepend=pos[0] - 1))
    idx = np.where(d != 0, np.arange(n), 0)
    np.maximum.accumulate(idx, out=idx)
    d = d[idx]
    backlash = 20.0
    mech = pos - d * backlash / 2          # engaged play; the dead band itself is left out
    frac = (mech / spacing_steps) % 1.0 - 0.5
    width = 0.1 * spacing_steps
    value = 1.0 / (1.0 + (2 * frac * spacing_steps / width) ** 2)
    value += 0.5 + 0.3 * np.sin(np.arange(n) * 2e-6) + rng.normal(0, 1 / 15, n)
    return pos, d.astype(np.int8), value


def time_counter(pos, d, val, chunk: int) -> tuple[float, StreamCounter]:
    c = StreamCounter()
    t = time.perf_counter()
    for i in range(0, val.size, chunk):
        c.feed(pos[i:i + chunk], d[i:i + chunk], val[i:i + chunk])
    c.finish()
    return time.perf_counter() - t, c


def best_of(k: int, f):
    """Shortest of k runs (the machine may be shared; the shortest is the software's own cost)."""
    runs = [f() for _ in range(k)]
    return min(runs, key=lambda r: r[0])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", type=int, default=10_000_000)
    ap.add_argument("--chunk", type=int, default=4096)
    ap.add_argument("--repeat", type=int, default=3, help="runs of each; the best counts")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args(argv)
    out = {}
    for name, spacing, reads in (("step_mode_60", 60.0, 1), ("fast_detector_120x10", 120.0, 10)):
        pos, d, val = make_trace(a.samples, spacing, reads)
        dt, c = best_of(a.repeat, lambda: time_counter(pos, d, val, a.chunk))
        dist = int(0.5 * spacing * reads)

        def fp():
            t = time.perf_counter()
            pk, _ = find_peaks(val, prominence=0.5, distance=dist)
            return time.perf_counter() - t, pk

        dt_fp, peaks = best_of(a.repeat, fp)
        out[name] = {"samples": a.samples, "chunk": a.chunk,
                     "counter_msamples_per_s": a.samples / dt / 1e6,
                     "find_peaks_msamples_per_s": a.samples / dt_fp / 1e6,
                     "counter_vs_find_peaks": dt_fp / dt,
                     "crossings": c.crossings, "find_peaks_peaks": int(peaks.size), "modes": c.modes}
    if a.json:
        print(json.dumps(out, indent=2))
    else:
        for name, r in out.items():
            print(f"{name}: counter {r['counter_msamples_per_s']:.1f} Msamples/s, find_peaks "
                  f"{r['find_peaks_msamples_per_s']:.1f} Msamples/s, ratio {r['counter_vs_find_peaks']:.2f}"
                  f" (crossings {r['crossings']}, find_peaks peaks {r['find_peaks_peaks']}, modes {r['modes']})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
