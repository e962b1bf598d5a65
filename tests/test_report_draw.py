"""Drawing helpers of the report: downsampling that keeps blips, label spacing, bins, offsets."""
import math

import numpy as np

from daq.report import (PassBlips, backlash_offsets, centre_differences, label_stride,
                        minmax_envelope, spacing_bins)


def test_envelope_keeps_a_one_sample_blip_in_a_long_trace():
    # 300 000 samples of noise with one sample-wide spike: a plain decimation
    # (every k-th sample) would drop it, min/max per column must not.
    rng = np.random.default_rng(5)
    x = np.arange(300_000)
    y = rng.normal(0.0, 0.01, x.size)
    y[123_457] = 5.0
    y[222_222] = -3.0
    xd, yd = minmax_envelope(x, y, 1400)
    assert xd.size <= 2 * 1400
    assert yd.max() == 5.0 and yd.min() == -3.0
    # The spike is drawn within one pixel column of where it is.
    col = (x[-1] - x[0]) / 1400
    assert abs(xd[np.argmax(yd)] - 123_457) <= col
    assert abs(xd[np.argmin(yd)] - 222_222) <= col
    # Drawn points go left to right, as a line plot needs.
    assert np.all(np.diff(xd) >= 0)


def test_envelope_passes_short_traces_through_sorted():
    x = np.array([5, 3, 4, 1])
    y = np.array([0.5, 0.3, 0.4, 0.1])
    xd, yd = minmax_envelope(x, y, 1000)
    assert xd.tolist() == [1, 3, 4, 5] and yd.tolist() == [0.1, 0.3, 0.4, 0.5]


def test_envelope_of_a_down_pass_with_repeated_reads():
    # A down pass read three times per step: positions fall and repeat.
    x = np.repeat(np.arange(50_000, 0, -1), 3)
    y = np.sin(x / 500.0)
    xd, yd = minmax_envelope(x, y, 500)
    assert xd.size <= 1000
    assert math.isclose(yd.max(), y.max()) and math.isclose(yd.min(), y.min())


def test_label_stride_is_1_2_5_and_keeps_labels_apart():
    assert label_stride(10, 1400) == 1
    for n in (1, 7, 60, 150, 400, 2500):
        k = label_stride(n, 1400, 34)
        lead = int(str(k)[0])
        assert lead in (1, 2, 5) and set(str(k)[1:]) <= {"0"}
        assert (n / k) * 34 <= 1400 or n <= 1        # labels at least 34 px apart on average
        if k > 1:
            smaller = k // 2 if lead in (1, 2) else k * 2 // 5
            assert (n / smaller) * 34 > 1400          # and no finer stride would have fitted


def test_spacing_bins_centre_whole_steps():
    d = np.array([44, 45, 45, 46, 46, 46, 47, 92], dtype=float)
    edges = spacing_bins(d)
    counts, _ = np.histogram(d, edges)
    # Every whole step has its own bin, centred on it.
    assert np.allclose((edges[:-1] + edges[1:]) / 2 % 1, 0)
    assert counts.sum() == d.size and counts[0] == 1 and counts.max() == 3


def test_spacing_bins_for_fractional_centres():
    d = np.random.default_rng(2).normal(46.2, 0.3, 500)
    edges = spacing_bins(d)
    assert edges[0] <= d.min() and edges[-1] >= d.max() and edges.size <= 61


def test_backlash_offsets_from_the_mode_map():
    # Mode map rows as analysis.pipeline writes them; None = never seen that way.
    rows = [{"mode": k, "centre_up_steps": 1000 + 46.0 * k + 6.0, "centre_down_steps": 1000 + 46.0 * k - 6.0,
             "centre_steps": 1000 + 46.0 * k} for k in range(20)]
    rows[3]["centre_down_steps"] = None
    m, off = backlash_offsets({"mode_map": rows})
    assert 3 not in m.tolist() and m.size == 19 and np.allclose(off, 12.0)
    assert backlash_offsets({"mode_map": []})[0].size == 0


def test_centre_differences_show_a_missed_mode_as_two_spacings():
    modes = np.array([0, 1, 2, 3, 5, 6])                 # mode 4 missed on this pass
    up = PassBlips(0, 1, 1000 + 46.0 * modes, modes)
    down = PassBlips(1, -1, (1000 + 46.0 * modes - 12.0)[::-1], modes[::-1])
    d = centre_differences([up, down])
    assert d.size == 10
    assert np.allclose(np.sort(d), [46.0] * 8 + [92.0] * 2)
