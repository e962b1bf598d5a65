"""Per-sample loops of the counter's signal stage, compiled with numba.

Each replaces several whole-array numpy passes (and their temporaries) by
one or a few passes over the samples. Their order of operations (which
values are added in which order) is fixed by the data alone, so results never
depend on how the stream was cut. They are compiled ahead of time at install,
or by numba on first use (analysis/compiled.py says which and why). Only the
loops live here; every decision stays in counter.py.
"""
from __future__ import annotations

import numpy as np
from analysis.compiled import kernel

from analysis.counter_settings import BLOCK, NOISE_STRIDE

@kernel(cache=True, nogil=True)
def check_chunk(d, x):
    """-1 if a value is not finite, 0 if a direction is not +1 or -1, else 1.

    Two branch-free reductions (they compile to vector code); numpy copies
    the chunk into place, which is faster than any loop here.
    """
    big = 1.7976931348623157e308
    bad = False
    for i in range(x.size):
        bad |= not (abs(x[i]) <= big)     # inf and NaN fail the comparison
    if bad:
        return -1
    off = False
    for i in range(d.size):
        di = d[i]
        off |= (di != 1) & (di != -1)
    return 0 if off else 1


@kernel(cache=True, nogil=True)
def despiked_block_means(xs, out):
    """Block means of the samples with single-sample dropouts raised.

    ``xs`` holds the samples with one neighbour each side; sample i is
    ``max(xs[i+1], min(xs[i], xs[i+2]))`` and each block of BLOCK samples is
    added in order, then divided by BLOCK (a short last block by its length).
    Writes ``out`` (length ceil((len(xs)-2)/BLOCK)). The despiked samples are
    added as they are made: a batch-sized temporary cost more than the loop.
    """
    ns = xs.size - 2
    nb = out.size
    full = ns // BLOCK
    for b in range(full):
        j = b * BLOCK
        s = max(xs[j + 1], min(xs[j], xs[j + 2]))
        for i in range(j + 1, j + BLOCK):
            s += max(xs[i + 1], min(xs[i], xs[i + 2]))
        out[b] = s / BLOCK
    if full < nb:
        j = full * BLOCK
        s = max(xs[j + 1], min(xs[j], xs[j + 2]))
        for i in range(j + 1, ns):
            s += max(xs[i + 1], min(xs[i], xs[i + 2]))
        out[full] = s / (ns - j)


# the noise state carried between batches (a float array, see scan_batch)
(NZ_SIGMA, NZ_EMA_SUM, NZ_EMA_COUNT, NZ_HAS_EMA, NZ_GROUP_SUM, NZ_GROUP_COUNT, NZ_GROUP_MAX,
 NZ_RUN_MAX) = range(8)


@kernel(cache=True, nogil=True)
def scan_batch(x, a, means, base, lo_sigma, hi_sigma, min_height, clip_sigma, group_blocks,
               alpha, kappa, floor, final, noise, open_start, open_trig, starts, ends,
               end_blocks, sigma_at):
    """One batch of samples (stream index a on, whole blocks but perhaps the last):
    the noise level, and runs above the re-arm level that reach the trigger level.

    Noise: on every NOISE_STRIDE-th sample, the excursion below the baseline
    ``min(x - base, 0)`` clipped at ``clip_sigma`` sigmas (the sigma in force,
    so spikes and dropouts do not inflate it), summed in sample order over a
    group of ``group_blocks`` blocks; at each group's end (and at the end of
    the stream when ``final``) the group's sum and count of non-zero terms
    enter running averages with weight ``alpha``, and sigma becomes
    ``kappa * average excursion``, at least ``floor`` and 1e-3 of the
    largest block excess ``means - base`` seen. ``noise`` (NZ_* fields) is
    updated in place; ``sigma_at`` gets the sigma in force for each block.

    Hysteresis: sample i (block b = i // BLOCK) is above the re-arm level
    when ``x[i] > base[b] + lo_sigma * sigma`` and triggers when
    ``x[i] > base[b] + max(hi_sigma * sigma, min_height)``. ``open_start``
    (-1 for none) is a run still open from the previous batch, ``open_trig``
    whether it has triggered. Writes the completed triggered runs as stream
    indices [start, end) and the block (in the batch) of the sample that
    ended each (of the last sample when the stream's end did); a run still
    open at the end is carried unless ``final``. Returns (runs written,
    open start, open trig).
    """
    n = x.size
    nb = base.size
    k = 0
    run = open_start
    trig = open_trig if run >= 0 else False
    # the noise state in locals (array elements would be re-read and re-written per block)
    sigma = noise[NZ_SIGMA]
    ema_sum, ema_cnt, has_ema = noise[NZ_EMA_SUM], noise[NZ_EMA_COUNT], noise[NZ_HAS_EMA]
    g_sum, g_cnt, g_max, r_max = (noise[NZ_GROUP_SUM], noise[NZ_GROUP_COUNT],
                                  noise[NZ_GROUP_MAX], noise[NZ_RUN_MAX])
    b_first = a // BLOCK
    for b in range(nb):
        i0 = b * BLOCK
        i1 = min(i0 + BLOCK, n)
        sigma_at[b] = sigma
        bl = base[b]
        # noise terms of this block, in sample order
        clip = -(clip_sigma * sigma)
        s = 0.0
        first = True
        for j in range(0, BLOCK, NOISE_STRIDE):
            v = 0.0
            if i0 + j < n:
                v = max(min(x[i0 + j] - bl, 0.0), clip)
                if v != 0.0:
                    g_cnt += 1.0
            s = v if first else s + v
            first = False
        g_sum += s
        g_max = max(g_max, means[b] - bl)
        # hysteresis over the block's samples; a block wholly below the re-arm level
        # outside a run, or wholly above it inside one, needs no look sample by sample
        lo_t = bl + lo_sigma * sigma
        hi_t = bl + max(hi_sigma * sigma, min_height)
        b_hi = x[i0]
        b_lo = x[i0]
        if i1 - i0 == BLOCK:              # a whole block: a fixed count, unrolled
            for i in range(i0 + 1, i0 + BLOCK):
                b_hi = max(b_hi, x[i])
                b_lo = min(b_lo, x[i])
        else:
            for i in range(i0 + 1, i1):
                b_hi = max(b_hi, x[i])
                b_lo = min(b_lo, x[i])
        if run < 0 and not b_hi > lo_t:
            pass
        elif run >= 0 and b_lo > lo_t:
            trig = trig or b_hi > hi_t
        else:
            for i in range(i0, i1):
                v = x[i]
                if v > lo_t:
                    if run < 0:
                        run = a + i
                        trig = False
                    if v > hi_t:
                        trig = True
                elif run >= 0:
                    if trig:
                        starts[k] = run
                        ends[k] = a + i
                        end_blocks[k] = b
                        k += 1
                    run = -1
                    trig = False
        # the end of a noise group: a new sigma for the blocks after it
        if (b_first + b + 1) % group_blocks == 0 or (final and b == nb - 1):
            if has_ema == 0.0:
                ema_sum, ema_cnt, has_ema = -g_sum, g_cnt, 1.0
            else:
                ema_sum = (1 - alpha) * ema_sum + alpha * -g_sum
                ema_cnt = (1 - alpha) * ema_cnt + alpha * g_cnt
            r_max = max(r_max, g_max)
            g_sum, g_cnt, g_max = 0.0, 0.0, 0.0
            sig = kappa * ema_sum / ema_cnt if ema_cnt > 0 else sigma
            sigma = max(max(sig, floor), 1e-3 * r_max)
    noise[NZ_SIGMA] = sigma
    noise[NZ_EMA_SUM], noise[NZ_EMA_COUNT], noise[NZ_HAS_EMA] = ema_sum, ema_cnt, has_ema
    noise[NZ_GROUP_SUM], noise[NZ_GROUP_COUNT] = g_sum, g_cnt
    noise[NZ_GROUP_MAX], noise[NZ_RUN_MAX] = g_max, r_max
    if run >= 0 and final:
        if trig:
            starts[k] = run
            ends[k] = a + n
            end_blocks[k] = nb - 1
            k += 1
        run = -1
        trig = False
    return k, run, trig


@kernel(cache=True, nogil=True, inline="always")
def _excess(x, base, t0, b0, final, i):
    """Sample i (stream index) above the baseline; one past either end of the
    stream reflects about the end sample (or repeats the newest one while more may come)."""
    last = t0 + x.size - 1
    if i < t0:
        i = t0 + 1
    elif i > last:
        i = last - 1 if final else last
    return x[i - t0] - base[i // BLOCK - b0]


@kernel(cache=True, nogil=True)
def measure_runs(x, p, base, t0, b0, final, st, en, cut_l, cut_r, long_, need, out_f, out_i, cuts):
    """Centre, area, height and extent of each candidate run [st, en) (stream indices),
    and where runs holding two blips are to be cut.

    With r the excess over the baseline and med its 3-point median: the
    centre is the med-above-half-maximum weighted mean position (so tails, a
    neighbour's overlap and a dead-band plateau do not pull it); pmin / pmax
    the positions where med is at least half its maximum; the peak the first
    sample reaching the raw maximum; the height the raw maximum unless it is
    more than 2.5 times the median's (a spike riding on the blip). A run cut
    on the left (right) while still above half height was only partly
    crossed. ``x``, ``p`` start at stream index t0, ``base`` (per block) at
    block b0. Columns: out_f = pos, area, height, hmed, pmin, pmax, step;
    out_i = peak, partial.

    Valleys (in runs flagged ``long_``): a stretch where med lies below half
    the lower of the highest values on its left and on its right within the
    run, that lower value reaching ``need`` (the trigger level): a trough the
    signal never got back down to the re-arm level in, e.g. under drift the
    baseline could not follow. The stream index of each valley's lowest
    sample goes to ``cuts``, in order; returns how many.
    """
    longest = 0
    for j in range(st.size):
        longest = max(longest, en[j] - st[j])
    med = np.empty(longest)
    right = np.empty(longest)
    k = 0
    for j in range(st.size):
        s, e = st[j], en[j]
        ln = e - s
        hraw = -np.inf
        hmed = -np.inf
        peak = s
        nd = need[j]
        # a valley needs a dip below half the peak so far (itself at least nd) and,
        # after it, a rise to at least nd and above twice the lowest point since the
        # first such dip: without that, no sample can pass the valley test below
        dipped = False
        dip_low = np.inf
        maybe = False
        # pass 1: the excess (a window of three rolling along), its 3-point median, the maxima
        inside = s - 1 >= t0 and e < t0 + x.size          # away from the stream's ends
        if inside:
            rm = x[s - 1 - t0] - base[(s - 1) // BLOCK - b0]
            r0 = x[s - t0] - base[s // BLOCK - b0]
        else:
            rm = _excess(x, base, t0, b0, final, s - 1)
            r0 = _excess(x, base, t0, b0, final, s)
        for i in range(ln):
            q = s + 1 + i
            if inside:
                rp = x[q - t0] - base[q // BLOCK - b0]
            else:
                rp = _excess(x, base, t0, b0, final, q)
            m = max(min(rm, r0), min(max(rm, r0), rp))
            med[i] = m
            if r0 > hraw:
                hraw = r0
                peak = s + i
            if m > hmed:
                hmed = m
            if dipped:
                dip_low = min(dip_low, m)
                if m >= nd and m > 2.0 * dip_low:
                    maybe = True
            elif m < 0.5 * hmed and hmed >= nd:
                dipped = True
                dip_low = m
            rm = r0
            r0 = rp
        check = long_[j] and maybe
        # pass 2 (runs that may hold a valley): the highest value to the right of each sample
        if check:
            top = -np.inf
            for i in range(ln - 1, -1, -1):
                top = max(top, med[i])
                right[i] = top
        # pass 3: valleys, and the weights of the samples above half height
        half = 0.5 * hmed
        ref = p[s - t0]
        sw = 0.0
        swp = 0.0
        pmin = np.inf
        pmax = -np.inf
        left = -np.inf
        low_i = -1
        i_lo, i_hi = 0, ln
        if not check:
            # only samples at or above half height weigh in (the rest add exactly zero):
            # without a valley search, pass 3 needs only the stretch between the first
            # and the last of them, a blip's core rather than its long tails
            while i_lo < ln and med[i_lo] < half:
                i_lo += 1
            while i_hi > i_lo and med[i_hi - 1] < half:
                i_hi -= 1
        for i in range(i_lo, i_hi):
            m = med[i]
            if check:
                left = max(left, m)
                side = min(left, right[i])
                if m < 0.5 * side and side >= nd:
                    if low_i < 0 or m < med[low_i]:
                        low_i = i
                elif low_i >= 0:
                    cuts[k] = s + low_i
                    k += 1
                    low_i = -1
            w = max(m - half, 0.0)
            q = p[s + i - t0]
            sw += w
            swp += w * (q - ref)
            if m >= half:
                pmin = min(pmin, q)
                pmax = max(pmax, q)
        if low_i >= 0:
            cuts[k] = s + low_i
            k += 1
        cen = swp / sw if sw > 0 else 0.0
        partial = (cut_l[j] and med[0] >= half) or (cut_r[j] and med[ln - 1] >= half)
        out_f[j, 0] = ref + cen
        out_f[j, 1] = sw
        out_f[j, 2] = hraw if hraw <= 2.5 * hmed else hmed
        out_f[j, 3] = hmed
        out_f[j, 4] = pmin
        out_f[j, 5] = pmax
        out_f[j, 6] = abs(p[e - 1 - t0] - ref) / max(ln - 1, 1)
        out_i[j, 0] = peak
        out_i[j, 1] = 1 if partial else 0
    return k


@kernel(cache=True, nogil=True)
def _sliding(a, w, take_max, out):
    """Minimum (or maximum) over a centred window of w (odd) values, the ends
    extended with the end values: scipy.ndimage's minimum_filter1d /
    maximum_filter1d with mode="nearest", by van Herk's and Gil & Werman's
    method (prefix and suffix extrema within blocks of w: three passes, any w)."""
    n = a.size
    h = w // 2
    L = n + 2 * h
    pad = np.empty(L)
    for i in range(L):
        pad[i] = a[min(max(i - h, 0), n - 1)]
    pre = np.empty(L)
    suf = np.empty(L)
    for b0 in range(0, L, w):             # block by block: no division per value
        b1 = min(b0 + w, L)
        acc = pad[b0]
        pre[b0] = acc
        for i in range(b0 + 1, b1):
            acc = max(acc, pad[i]) if take_max else min(acc, pad[i])
            pre[i] = acc
        acc = pad[b1 - 1]
        suf[b1 - 1] = acc
        for i in range(b1 - 2, b0 - 1, -1):
            acc = max(acc, pad[i]) if take_max else min(acc, pad[i])
            suf[i] = acc
    for i in range(n):
        out[i] = max(suf[i], pre[i + w - 1]) if take_max else min(suf[i], pre[i + w - 1])


@kernel(cache=True, nogil=True)
def grey_opening(a, w, out):
    """A sliding minimum then a sliding maximum over w values (the ends extended):
    what is left of a signal under its narrow peaks."""
    tmp = np.empty(a.size)
    _sliding(a, w, False, tmp)
    _sliding(tmp, w, True, out)
