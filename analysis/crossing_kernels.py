"""The counter's per-candidate loop within one run, compiled with numba.

``merge_and_number`` is ``StreamCounter._one`` for the common case, a
candidate arriving while the open crossing is not the first of its run and
in the same direction, repeated over many candidates in one call: merge the
candidate into the open crossing (split blips, a kick seeing a blip again), or
close that crossing and open the next one, numbered from its anchor. It stops
at the first candidate it does not handle (a change of direction), which the
Python code takes over. The open crossing travels as two arrays (fields
``PF_*`` and ``PI_*``); closed crossings come back as rows, in stream order,
for the counter to emit. The arithmetic is the same, operation for
operation, as the Python path, so the two may take turns anywhere.
"""
from __future__ import annotations

import numpy as np
from analysis.compiled import kernel

# the open crossing: float fields
PF_REF, PF_SW, PF_SWP, PF_LAST, PF_H, PF_PMIN, PF_PMAX, PF_STEPSUM, PF_ANC_CENT = range(9)
PF_FIELDS = ("ref", "sw", "swp", "last", "h", "pmin", "pmax", "stepsum", "anc_cent")
# ... and integer fields (booleans as 0/1; anc_k is meaningless while anc_cent is NaN)
(PI_K, PI_D, PI_PEAK, PI_HASMAIN, PI_START, PI_END, PI_PARTS, PI_NPARTIAL, PI_FRESH,
 PI_ANC_K, PI_N, PI_DEADBAND, PI_REPEAT, PI_OFFLAT) = range(14)
PI_FIELDS = ("k", "d", "peak", "hasmain", "start", "end", "parts", "npartial", "fresh",
             "anc_k", "n", "deadband", "repeat", "offlat")
# closed crossings: integer and float columns
OI_K, OI_PEAK, OI_START, OI_END, OI_PARTS, OI_WEAK = range(6)
OF_CEN, OF_H, OF_WIDTH, OF_AREA = range(4)


@kernel(cache=True, nogil=True)
def close_crossing(Pf, Pi, wtyp, weak_width, glimpse_width):
    """(centre, width, weak) of the open crossing (StreamCounter._finalise_pending)."""
    sw = Pf[PF_SW]
    cen = Pf[PF_REF] + (Pf[PF_SWP] / sw if sw > 0 else 0.0)
    width = max(Pf[PF_PMAX] - Pf[PF_PMIN], 0.0) + Pf[PF_STEPSUM] / Pi[PI_PARTS]
    glimpse = Pi[PI_HASMAIN] == 0 or (wtyp != 0.0 and width < glimpse_width * wtyp)
    weak = (Pi[PI_NPARTIAL] >= Pi[PI_PARTS] or Pi[PI_DEADBAND] != 0 or Pi[PI_REPEAT] != 0
            or (Pi[PI_OFFLAT] != 0 and glimpse)
            or (wtyp != 0.0 and width < weak_width * wtyp))
    return cen, width, weak


@kernel(cache=True, nogil=True)
def merge_and_number(pos, area, height, peak, start, end, partial, pmin, pmax, step, d_c, i0,
                     Pf, Pi, S, f, htyp, wtyp, max_span, main_height, off_lattice,
                     weak_width, glimpse_width, out_i, out_f, gap_v, gap_n):
    """Candidates i0, i0+1, ... against the open crossing (Pf, Pi), updated in place.

    Returns (index of the first candidate not handled, crossings closed,
    spacings recorded). S > 0; htyp and wtyp 0.0 when not known yet.
    """
    n_out = 0
    n_gap = 0
    i = i0
    n = pos.size
    while i < n:
        d = Pi[PI_D]
        if Pi[PI_FRESH] != 0 or d_c[i] != d:
            break
        p = pos[i]
        h = height[i]
        main = htyp == 0.0 or h >= main_height * htyp
        if d * (p - Pf[PF_LAST]) < f * S and d * (p - Pf[PF_REF]) < max_span * S:
            a = area[i]
            if main:
                Pi[PI_HASMAIN] = 1
            Pf[PF_SW] += a
            Pf[PF_SWP] += a * (p - Pf[PF_REF])
            Pf[PF_LAST] = p
            if h > Pf[PF_H]:
                Pf[PF_H] = h
                Pi[PI_PEAK] = peak[i]
            Pi[PI_END] = max(Pi[PI_END], end[i])
            Pi[PI_PARTS] += 1
            if partial[i]:
                Pi[PI_NPARTIAL] += 1
            Pf[PF_PMIN] = min(Pf[PF_PMIN], pmin[i])
            Pf[PF_PMAX] = max(Pf[PF_PMAX], pmax[i])
            Pf[PF_STEPSUM] += step[i]
            i += 1
            continue
        # close the open crossing ...
        cen, width, weak = close_crossing(Pf, Pi, wtyp, weak_width, glimpse_width)
        has_anc = not np.isnan(Pf[PF_ANC_CENT])
        if not weak and has_anc and Pi[PI_N] >= 1:
            gap_v[n_gap] = d * (cen - Pf[PF_ANC_CENT]) / Pi[PI_N]
            gap_n[n_gap] = Pi[PI_N]
            n_gap += 1
        out_i[n_out, OI_K] = Pi[PI_K]
        out_i[n_out, OI_PEAK] = Pi[PI_PEAK]
        out_i[n_out, OI_START] = Pi[PI_START]
        out_i[n_out, OI_END] = Pi[PI_END]
        out_i[n_out, OI_PARTS] = Pi[PI_PARTS]
        out_i[n_out, OI_WEAK] = 1 if weak else 0
        out_f[n_out, OF_CEN] = cen
        out_f[n_out, OF_H] = Pf[PF_H]
        out_f[n_out, OF_WIDTH] = width
        out_f[n_out, OF_AREA] = Pf[PF_SW]
        n_out += 1
        # ... and open the next, numbered from the anchor (the last non-weak crossing)
        if weak and has_anc:
            anc_k, anc_cent = Pi[PI_ANC_K], Pf[PF_ANC_CENT]
        else:
            anc_k, anc_cent = Pi[PI_K], cen
        xs = d * (p - anc_cent) / S
        ns = max(0, int(np.rint(xs)))
        Pi[PI_K] = anc_k + d * ns
        Pi[PI_PEAK] = peak[i]
        Pi[PI_HASMAIN] = 1 if main else 0
        Pi[PI_START] = start[i]
        Pi[PI_END] = end[i]
        Pi[PI_PARTS] = 1
        Pi[PI_NPARTIAL] = 1 if partial[i] else 0
        Pi[PI_FRESH] = 0
        Pi[PI_ANC_K] = anc_k
        Pi[PI_N] = ns
        Pi[PI_DEADBAND] = 0
        Pi[PI_REPEAT] = 1 if ns == 0 else 0
        Pi[PI_OFFLAT] = 1 if abs(xs - ns) > off_lattice else 0
        Pf[PF_REF] = p
        Pf[PF_SW] = area[i]
        Pf[PF_SWP] = 0.0
        Pf[PF_LAST] = p
        Pf[PF_H] = h
        Pf[PF_PMIN] = pmin[i]
        Pf[PF_PMAX] = pmax[i]
        Pf[PF_STEPSUM] = step[i]
        Pf[PF_ANC_CENT] = anc_cent
        i += 1
    return i, n_out, n_gap


@kernel(cache=True, nogil=True)
def table_add(off, seen, hsum, wsum, strong, cnt, sums, sq, ks, d, cens, hs, ws, reliable):
    """Add crossings to the per-mode sums one at a time, in order (_ModeTable.add1 each)."""
    for j in range(ks.size):
        i = ks[j] - off
        seen[i] += 1.0
        hsum[i] += hs[j]
        wsum[i] += ws[j]
        if reliable[j]:
            strong[i] += 1.0
            row = 1 if d[j] < 0 else 0
            cnt[row, i] += 1.0
            sums[row, i] += cens[j]
            sq[row, i] += cens[j] * cens[j]


@kernel(cache=True, nogil=True)
def backlash_pairs(kc, cc, dc, kp, cp, dp, out):
    """d * (centre now - centre last run) for each mode crossed both ways in the two runs.

    For each crossing of the current run (mode kc, centre cc, direction dc),
    in order, the previous run's last crossing of the same mode, if it went
    the other way. Writes the differences into ``out``; returns how many.
    """
    if kc.size == 0 or kp.size == 0:
        return 0
    kmin = kp.min()
    last = np.full(kp.max() - kmin + 1, -1, np.int64)
    for j in range(kp.size):
        last[kp[j] - kmin] = j
    n = 0
    for i in range(kc.size):
        k = kc[i] - kmin
        if 0 <= k < last.size:
            j = last[k]
            if j >= 0 and dp[j] == -dc[i]:
                out[n] = dc[i] * (cc[i] - cp[j])
                n += 1
    return n
