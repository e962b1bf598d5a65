"""The first estimate of the mode spacing, from the counter's first candidates.

Used by analysis.counter while it holds its first candidates (the spacing is
not known yet): a periodogram of the candidate centres, then merged gaps.
"""
from __future__ import annotations

import numpy as np


def initial_spacing(runs: list[np.ndarray], weights: list[np.ndarray] | None = None
                    ) -> tuple[float | None, float]:
    """Spacing from the centres of the first candidates, robust to split blips.

    ``runs`` holds the candidate centres of each monotone run (``weights``
    their areas). An area-weighted Rayleigh periodogram of the centres peaks
    at the spacing and at its fractions (and, for split blips, at the finer
    split structure): the longest period with a strong peak is the spacing.
    It is then refined by merging candidates closer than half of it and taking
    the median gap between the merged centres. Returns (spacing, number of
    spacings the candidates span); the span is 0 when fewer than 70 % of the
    lattice places are occupied (the period found is then finer structure,
    not the spacing), and (None, 0) if there are too few candidates.
    """
    runs = [np.asarray(r, float) for r in runs]
    if weights is None:
        weights = [np.ones_like(r) for r in runs]
    use = [(r, np.asarray(w, float)) for r, w in zip(runs, weights) if r.size >= 3]
    if not use:
        return None, 0.0
    gaps = np.concatenate([np.abs(np.diff(r)) for r, _ in use])
    gaps = gaps[gaps > 0]
    span = max(float(np.ptp(r)) for r, _ in use)
    if gaps.size < 2 or span <= 0:
        return None, 0.0
    tmin = 0.5 * float(np.median(gaps))
    tmax = span / 3.0
    t0 = None
    if tmax > tmin:
        def power(grid):
            pw = np.zeros(grid.size)
            norm = 0.0
            for r, w in use:
                w = np.maximum(w, 0) + 1e-12
                pw += np.abs(np.exp(2j * np.pi * (r - r[0])[None, :] / grid[:, None]) @ w) ** 2
                norm += w.sum() ** 2
            return pw / norm

        # peaks are about T/span wide (relative): a grid at a quarter of that, then refined
        rel = 0.25 * tmin / span
        grid = np.exp(np.arange(np.log(tmin), np.log(tmax), rel))
        if grid.size > 4000:
            grid = np.exp(np.linspace(np.log(tmin), np.log(tmax), 4000))
        pw = power(grid)
        peak = (pw[1:-1] >= pw[:-2]) & (pw[1:-1] >= pw[2:])
        cand = np.flatnonzero(peak) + 1
        strong = cand[pw[cand] >= 0.35 * pw.max()]
        if strong.size:
            j = int(strong.max())
            fine = np.linspace(grid[j - 1], grid[j + 1], 41)
            t0 = float(fine[int(np.argmax(power(fine)))])
    if t0 is None:
        t0 = float(np.quantile(gaps, 0.75))
    merged = []
    for r, w in use:
        order = np.argsort(r)
        r, w = r[order], np.maximum(w[order], 1e-12)
        cid = np.cumsum(np.concatenate(([1], np.diff(r) >= 0.5 * t0)))
        cent = np.bincount(cid, weights=r * w)[1:] / np.bincount(cid, weights=w)[1:]
        if cent.size >= 2:
            merged.append(np.diff(cent))
    if not merged:
        return None, 0.0
    g = np.concatenate(merged)
    s = t0
    for _ in range(3):
        s = float(np.median(g / np.maximum(1.0, np.rint(g / s))))
    if s <= 0:
        return None, 0.0
    # a real spacing leaves few places of its lattice empty (a missed blip now
    # and then); the finer structure inside split blips leaves most of them empty
    occupied = (g.size + len(merged)) / (np.sum(np.maximum(1.0, np.rint(g / s))) + len(merged))
    return s, (span / s if occupied >= 0.7 else 0.0)
