"""The counter's compiled loops against reference implementations outside the project."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from analysis import signal_kernels as kern


@pytest.mark.parametrize("n", [1, 2, 5, 64, 65, 66, 131, 8322])
@pytest.mark.parametrize("w", [3, 5, 65, 129])
def test_grey_opening_is_scipy_ndimage(n, w):
    # Reference: scipy.ndimage.minimum_filter1d then maximum_filter1d, mode="nearest"
    # (a grey opening; van Herk / Gil-Werman must select exactly the same values).
    a = np.random.default_rng(n * 1000 + w).normal(size=n)
    a[::7] = a[0]                                       # ties as well
    ref = ndimage.maximum_filter1d(ndimage.minimum_filter1d(a, w, mode="nearest"), w, mode="nearest")
    out = np.empty(n)
    kern.grey_opening(a, w, out)
    assert np.array_equal(out, ref)


def test_despiked_block_means_against_numpy():
    # Reference: numpy, written the obvious way: a single-sample dropout is raised to
    # the lower of its neighbours, then means of consecutive 8-sample blocks.
    rng = np.random.default_rng(3)
    xs = rng.normal(size=8 * 50 + 5 + 2)
    xs[17] = -40.0                                      # a dropout
    seg = np.maximum(xs[1:-1], np.minimum(xs[:-2], xs[2:]))
    ref = [seg[i:i + 8].mean() for i in range(0, seg.size, 8)]
    out = np.empty(len(ref))
    kern.despiked_block_means(xs, out)
    assert out == pytest.approx(ref, rel=1e-12, abs=1e-12)
    assert out[2] > -1.0                                # the dropout did not pull its block down


def test_hysteresis_runs_against_a_plain_loop():
    # Reference: the textbook two-threshold comparator (common practice), one sample
    # at a time in Python: a run starts above `lo`, must pass `hi`, ends at or below `lo`.
    rng = np.random.default_rng(5)
    n = 8 * 400
    x = rng.normal(size=n)
    x[1000:1040] += 8.0
    x[2000:2003] += 3.0                                 # above lo, never above hi: not a run
    lo, hi = 2.0, 5.0
    runs, start, trig = [], -1, False
    for i, v in enumerate(x):
        if v > lo:
            if start < 0:
                start, trig = i, False
            trig = trig or v > hi
        elif start >= 0:
            if trig:
                runs.append((start, i))
            start = -1
    base, sig = np.zeros(n // 8), np.ones(n // 8)
    st, en, eb = (np.empty(n, np.int64) for _ in range(3))
    noise = np.zeros(8)
    noise[kern.NZ_SIGMA] = 1.0
    k, open_start, _ = kern.scan_batch(x, 0, base, base, lo, hi, 0.0, 4.0, 1024, 0.25, 1.53, 0.0,
                                       False, noise, -1, False, st, en, eb, np.empty(n // 8))
    assert list(zip(st[:k].tolist(), en[:k].tolist())) == runs
    assert (1000, 1040) in runs or any(s <= 1000 and e >= 1040 for s, e in runs)


def _measure(x, long_=True, need=5.0):
    n = x.size
    st, en = np.array([1], np.int64), np.array([n - 1], np.int64)
    out_f, out_i = np.empty((1, 7)), np.empty((1, 2), np.int64)
    cuts = np.empty(n, np.int64)
    base = np.zeros(n // 8 + 1)
    k = kern.measure_runs(x, np.arange(n, dtype=float), base, 0, 0, True, st, en,
                          np.zeros(1, bool), np.zeros(1, bool), np.array([long_]), np.array([need]),
                          out_f, out_i, cuts)
    return k, cuts[:k], out_f[0], out_i[0]


def test_two_blips_in_one_run_are_cut_at_the_valley_and_one_is_not():
    # Two Gaussian peaks (heights 40 and 30) over a floor of 6 that never drops to the
    # re-arm level: the cut belongs at the lowest point between them (numpy argmin).
    i = np.arange(400, dtype=float)
    two = 6.0 + 40 * np.exp(-0.5 * ((i - 120) / 12) ** 2) + 30 * np.exp(-0.5 * ((i - 280) / 12) ** 2)
    k, cuts, _, _ = _measure(two)
    assert k == 1 and cuts[0] == 120 + int(np.argmin(two[120:280]))
    one = 6.0 + 40 * np.exp(-0.5 * ((i - 200) / 30) ** 2)
    k, _, f, pk = _measure(one)
    assert k == 0
    # centre of a symmetric peak: its middle; peak index: the maximum (numpy argmax)
    assert f[0] == pytest.approx(200.0, abs=1e-9) and pk[0] == int(np.argmax(one))
    assert _measure(two, long_=False)[0] == 0           # only runs flagged long are searched
