"""The streaming mode counter: samples in, counted chip modes out.

Signal stage (vectorised per chunk, exact across chunk boundaries):
  * the baseline is a grey opening of 8-sample block means (single-sample
    dropouts filled in first), over ``baseline_window`` samples: it runs
    under blips as wide as the spacing and follows drift;
  * the noise level is the mean negative excursion below that baseline,
    averaged over ``noise_window`` samples and updated once per 2048-sample
    group (blips only ever push the signal up, so they do not inflate it);
  * hysteresis: a candidate is a run of samples above ``lo_sigma`` that
    reaches ``hi_sigma`` somewhere; it must also reach ``confirm_sigma`` in
    its 3-point median, so a single-sample spike never counts.

Event stage (an up/down counter; Python only per reversal, numpy per run):
  * candidates of one direction closer than ``merge_fraction`` of the spacing
    are one crossing (split blips, a stick-slip kick seeing a blip again);
  * moving on in the same direction, the mode index advances by the number
    of spacings travelled (a missed blip leaves a gap, not a shift);
  * after a reversal the first crossing is the mode last crossed, shifted by
    the backlash once it is known; at the first reversal, before the
    backlash is known, the blip heights of the two runs decide.

Every decision depends only on the samples, never on how they were chunked,
so feeding the same stream in any pieces gives the same events.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from scipy import ndimage

# [counter] rig keys and their defaults (schema format of daq/rig.py).
SETTINGS: dict[str, Any] = {
    "hi_sigma": 5.0,          # trigger: baseline + hi_sigma * noise
    "lo_sigma": 2.0,          # re-arm: back below baseline + lo_sigma * noise
    "confirm_sigma": 3.0,     # the 3-point median must reach this too (spikes do not)
    "min_height": 0.0,        # absolute floor for the trigger, detector units (0 = none)
    "baseline_window": 512,   # samples; longer than the widest blip, shorter than drift
    "noise_window": 8192,     # samples the noise level is averaged over
    "merge_fraction": 0.5,    # structure closer than this fraction of the spacing is one mode
    "expected_spacing_steps": 0.0,  # 0 = learn the spacing from the first blips
}

BLOCK = 8            # samples per baseline block
GROUP = 2048         # samples per noise/spacing update (a multiple of BLOCK)
N_INIT = 12          # candidates in one run before the spacing is first estimated
GAP_MEMORY = 24      # recent spacings the running spacing is the median of
MAX_RUN_SAMPLES = 65536   # samples of the runs kept for the first backlash fit
FIT_TRAVEL = 4.0     # spacings travelled after the first reversal before the backlash fit
WEAK_WIDTH = 0.3     # a crossing narrower than this fraction of the typical width,
WEAK_HEIGHT = 0.25   # or lower than this fraction of the typical height, is "weak":
                     # numbered, but never the anchor the next crossings are numbered from
MAIN_HEIGHT = 0.35   # a crossing with no candidate this tall (of typical) is weak too
MAX_SPAN = 0.65      # a crossing never spans more than this many spacings
# mean |negative excursion| below the baseline -> noise sigma; calibrated on
# white Gaussian noise against the default baseline window (see tests).
KAPPA = 1.45


def validate_settings(settings: dict) -> list[tuple[str, str]]:
    """(key, one-line message) for every value the counter cannot work with."""
    s = dict(SETTINGS)
    s.update(settings or {})
    out: list[tuple[str, str]] = []

    def num(key: str) -> float | None:
        v = s[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            out.append((key, f"must be a finite number, got {v!r}"))
            return None
        return float(v)

    hi, lo, conf = num("hi_sigma"), num("lo_sigma"), num("confirm_sigma")
    if lo is not None and lo < 0:
        out.append(("lo_sigma", f"must not be negative, got {lo}"))
    if hi is not None and lo is not None and lo >= hi:
        out.append(("lo_sigma", f"must be below hi_sigma ({lo} >= {hi}): the counter would never re-arm"))
    if conf is not None and conf <= 0:
        out.append(("confirm_sigma", f"must be positive, got {conf}"))
    mh = num("min_height")
    if mh is not None and mh < 0:
        out.append(("min_height", f"must not be negative, got {mh}"))
    for key, least in (("baseline_window", 3 * BLOCK), ("noise_window", GROUP)):
        v = s[key]
        if isinstance(v, bool) or not isinstance(v, int):
            out.append((key, f"must be an integer number of samples, got {v!r}"))
        elif v < least:
            out.append((key, f"must be at least {least} samples, got {v}"))
    mf = num("merge_fraction")
    if mf is not None and not 0.05 <= mf <= 0.9:
        out.append(("merge_fraction", f"must be between 0.05 and 0.9 of the spacing, got {mf}"))
    es = num("expected_spacing_steps")
    if es is not None and es < 0:
        out.append(("expected_spacing_steps", f"must not be negative (0 = learn it), got {es}"))
    return out


@dataclass(slots=True)
class Event:
    """A counted crossing of a mode ("blip") or a change of direction ("reversal").

    ``index`` is the sample index in the whole stream (the blip's peak);
    ``position_steps`` the blip centre (intensity-weighted, sub-step) or the
    reversal point; ``mode`` the mode index (for a reversal: the last mode
    crossed); ``height`` above baseline in detector units; ``width_steps`` the
    Gaussian-equivalent FWHM from the blip's second moment.
    """

    kind: str
    index: int
    position_steps: float
    direction: int
    mode: int
    height: float
    width_steps: float

    def to_dict(self) -> dict:
        return asdict(self)


# Candidate fields, in the order of a candidate tuple / array columns.
_CFIELDS = ("start", "end", "peak", "pos", "area", "height", "d", "partial", "pmin", "pmax", "step")
# Finalised crossing record columns (kept for the offline analysis, not in the state).
_RFIELDS = ("mode", "index", "start", "end", "position_steps", "direction", "height",
            "width_steps", "area", "parts", "weak", "run")


def initial_spacing(runs: list[np.ndarray], weights: list[np.ndarray] | None = None
                    ) -> tuple[float | None, float]:
    """Spacing from the centres of the first candidates, robust to split blips.

    ``runs`` holds the candidate centres of each monotone run (``weights``
    their areas). An area-weighted Rayleigh periodogram of the centres peaks
    at the spacing and at its fractions (and, for split blips, at the finer
    split structure): the longest period with a strong peak is the spacing.
    It is then refined by merging candidates closer than half of it and taking
    the median gap between the merged centres. Returns (spacing, number of
    spacings the candidates span); (None, 0) if there are too few.
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
        rel = max(0.02 * tmin / span, 1e-4)
        grid = np.exp(np.arange(np.log(tmin), np.log(tmax), rel))
        if grid.size > 20000:
            grid = np.exp(np.linspace(np.log(tmin), np.log(tmax), 20000))
        power = np.zeros(grid.size)
        norm = 0.0
        for r, w in use:
            w = np.maximum(w, 0) + 1e-12
            ph = np.exp(2j * np.pi * (r - r[0])[None, :] / grid[:, None])
            power += np.abs(ph @ w) ** 2
            norm += w.sum() ** 2
        power /= norm
        peak = (power[1:-1] >= power[:-2]) & (power[1:-1] >= power[2:])
        cand = np.flatnonzero(peak) + 1
        strong = cand[power[cand] >= 0.35 * power.max()]
        if strong.size:
            t0 = float(grid[strong.max()])
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
    return (s, span / s) if s > 0 else (None, 0.0)


class _Buf:
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

    @property
    def a(self) -> np.ndarray:
        return self.arr[self.lo:self.hi]


class _ModeTable:
    """Per-mode sums (per direction) for the mode map and the estimate."""

    def __init__(self) -> None:
        self.off = 0
        z = np.zeros(0)
        self.cnt = np.zeros((2, 0))
        self.sum = np.zeros((2, 0))
        self.sq = np.zeros((2, 0))
        self.seen = z.copy()
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
        self.off = lo

    def add(self, k, d, pos, h, w, reliable) -> None:
        k = np.asarray(k, np.int64)
        if k.size == 0:
            return
        self._grow(int(k.min()), int(k.max()))
        i = k - self.off
        np.add.at(self.seen, i, 1.0)
        np.add.at(self.hsum, i, np.asarray(h, float))
        np.add.at(self.wsum, i, np.asarray(w, float))
        rel = np.asarray(reliable, bool)
        if rel.any():
            row = (np.asarray(d)[rel] < 0).astype(np.int64)   # 0 = up, 1 = down
            p = np.asarray(pos, float)[rel]
            np.add.at(self.cnt, (row, i[rel]), 1.0)
            np.add.at(self.sum, (row, i[rel]), p)
            np.add.at(self.sq, (row, i[rel]), p * p)

    def to_state(self) -> dict:
        return {"off": self.off, "cnt": self.cnt.tolist(), "sum": self.sum.tolist(),
                "sq": self.sq.tolist(), "seen": self.seen.tolist(), "hsum": self.hsum.tolist(),
                "wsum": self.wsum.tolist()}

    @classmethod
    def from_state(cls, st: dict) -> "_ModeTable":
        t = cls()
        t.off = int(st["off"])
        t.cnt = np.array(st["cnt"], float).reshape(2, -1)
        t.sum = np.array(st["sum"], float).reshape(2, -1)
        t.sq = np.array(st["sq"], float).reshape(2, -1)
        t.seen = np.array(st["seen"], float)
        t.hsum = np.array(st["hsum"], float)
        t.wsum = np.array(st["wsum"], float)
        return t


def fit_spacing(k: np.ndarray, centre: np.ndarray, weight: np.ndarray | None = None
                ) -> tuple[float | None, float | None, dict]:
    """Spacing = slope of blip centre against mode number at the middle of the range.

    A quadratic is fitted (the spacing in steps changes across a wide sweep,
    Littrow tuning is not linear in angle), centred on the middle mode so the
    linear coefficient is the spacing there; its standard error comes from the
    residual scatter. Fewer than 6 modes: a straight line; fewer than 3: None.
    Returns (spacing, standard error, details).
    """
    k = np.asarray(k, float)
    c = np.asarray(centre, float)
    w = np.ones_like(k) if weight is None else np.asarray(weight, float)
    ok = np.isfinite(c) & np.isfinite(k) & (w > 0)
    k, c, w = k[ok], c[ok], w[ok]
    if k.size < 3:
        return None, None, {}
    kc = 0.5 * (k.min() + k.max())
    x = k - kc
    deg = 2 if k.size >= 6 else 1
    keep = np.ones(k.size, bool)
    for _ in range(3):   # drop gross outliers (a centre pulled by a kick or a glitch)
        coef, cov, resid = _wls(x[keep], c[keep], w[keep], deg)
        r_all = c - np.polyval(coef, x)
        mad = 1.4826 * np.median(np.abs(r_all[keep] - np.median(r_all[keep])))
        limit = max(5.0 * mad, 1e-9)
        new = np.abs(r_all) <= limit
        if new.sum() < deg + 2 or np.array_equal(new, keep):
            break
        keep = new
    coef, cov, resid = _wls(x[keep], c[keep], w[keep], deg)
    slope = coef[-2]
    se = math.sqrt(max(cov[-2, -2], 0.0))
    details = {"k_centre": kc, "degree": deg, "coef": coef.tolist(),
               "n_modes": int(keep.sum()), "outliers": int((~keep).sum()),
               "residual_rms_steps": float(np.sqrt(np.mean(resid ** 2))) if resid.size else 0.0,
               "centre_steps": float(np.polyval(coef, 0.0))}
    return abs(float(slope)), se, details


def _wls(x, y, w, deg):
    """Weighted least squares polynomial (highest power first), covariance from residuals."""
    A = np.vander(x, deg + 1)
    sw = np.sqrt(w)
    Aw, yw = A * sw[:, None], y * sw
    coef, *_ = np.linalg.lstsq(Aw, yw, rcond=None)
    resid = y - A @ coef
    dof = max(x.size - (deg + 1), 1)
    s2 = float(np.sum(w * resid ** 2) / dof)
    try:
        cov = np.linalg.inv(Aw.T @ Aw) * s2
    except np.linalg.LinAlgError:
        cov = np.full((deg + 1, deg + 1), np.inf)
    return coef, cov, resid


class StreamCounter:
    """Counts chip modes in a stream of (commanded position, direction, value) samples."""

    def __init__(self, settings: dict | None = None):
        s = dict(SETTINGS)
        if settings:
            unknown = set(settings) - set(SETTINGS)
            if unknown:
                raise ValueError(f"unknown counter setting(s): {', '.join(sorted(unknown))}")
            s.update(settings)
        problems = validate_settings(s)
        if problems:
            key, msg = problems[0]
            raise ValueError(f"[counter] {key}: {msg}")
        self.settings = s
        wb = max(3, int(round(s["baseline_window"] / BLOCK)))
        self._wb = wb if wb % 2 else wb + 1        # odd number of blocks
        self._margin = self._wb                     # blocks of look-ahead the baseline needs
        self._alpha = min(1.0, GROUP / float(s["noise_window"]))
        self._f = float(s["merge_fraction"])
        # --- sample stage ---
        self._xb = _Buf(np.float64)  # samples from absolute index _t0
        self._pb = _Buf(np.float64)
        self._db = _Buf(np.int8)
        self._t0 = 0                 # absolute index of the buffers' first sample
        self._n = 0                  # samples received
        self._done = 0               # samples through the detector
        self._last_dir = 0           # direction of the last sample through the detector
        self._last_in = 0            # direction of the last sample received
        self._bmb = _Buf(np.float64)  # block means from block _bm0
        self._bm0 = 0
        self._nb = 0                 # complete (or final partial) blocks computed
        self._bbb = _Buf(np.float64)  # baseline per block from block _bb0 up to _done // BLOCK
        self._bb0 = 0
        self._sigma: float | None = None
        self._floor = 0.0
        self._ema: list[float] | None = None   # [sum |neg|, count]
        self._gacc = [0.0, 0.0]                 # current group's noise sums
        self._gneg: list[float] = []            # ... its per-block sums of negative excursions
        self._rmax = 0.0
        self._gmax = 0.0
        self._open = -1              # start of the run above lo that is still open
        self._open_trig = False
        self._revs: list[int] = []   # recent reversal indices (to cut candidates at turns)
        self._finished = False
        self._finished_scan = False
        self._done_events = 0
        # --- event stage ---
        es = float(s["expected_spacing_steps"])
        self._S: float | None = es if es > 0 else None
        self._phase = "run" if self._S else "init"
        self._held: list[list] = []  # ["c", cand tuple] / ["r", (index, pos, dir)] in time order
        self._lastrev: tuple | None = None   # (index, position, new direction)
        self._P: dict | None = None  # the crossing still open to merging
        self._L: dict | None = None  # the last finalised crossing
        self._gaps: list[float] = []
        self._ns: list[int] = []
        self._gaps_new = False
        self._wtyp: float | None = None   # typical crossing width / height (weak test)
        self._htyp: float | None = None
        self._wrec: list[float] = []
        self._hrec: list[float] = []
        self._b: float | None = None
        self._bpairs: list[float] = []
        self._run = 0
        # crossings of the current and the previous run: [[ks], [centres], [heights], dir, reliable]
        self._run_cur: list[list] = []
        self._run_prev: list[list] = []
        self._n_cross = 0
        self._table = _ModeTable()
        self._records: list[dict] = []
        self._out: list[Event] = []
        self._est_cache: tuple | None = None

    # ------------------------------------------------------------------ input
    def feed(self, position_steps, direction, value) -> list[Event]:
        """Take one chunk of samples; return the events confirmed so far (in order)."""
        if self._finished:
            raise RuntimeError("StreamCounter.feed() after finish()")
        p = np.asarray(position_steps, dtype=np.float64).ravel()
        x = np.asarray(value, dtype=np.float64).ravel()
        d = np.asarray(direction).ravel()
        if not (p.size == x.size == d.size):
            raise ValueError(f"feed: position, direction and value differ in length "
                             f"({p.size}, {d.size}, {x.size})")
        if p.size == 0:
            return self._take()
        if not np.all(np.isfinite(x)):
            raise ValueError("feed: value contains NaN or infinity")
        d = np.sign(d).astype(np.int8)
        if not d.all():              # 0 = no move: keep the last direction
            idx = np.where(d != 0, np.arange(d.size), -1)
            np.maximum.accumulate(idx, out=idx)
            last_in = int(self._d[-1]) if self._d.size else self._last_in
            d = np.where(idx >= 0, d[np.maximum(idx, 0)], last_in or 1).astype(np.int8)
        self._xb.extend(x)
        self._pb.extend(p)
        self._db.extend(d)
        self._n += x.size
        self._last_in = int(d[-1])
        self._process(final=False)
        return self._take()

    def finish(self) -> list[Event]:
        """End of stream: flush everything still pending; return the last events."""
        if self._finished:
            return self._take()
        self._process(final=True)
        self._finished = True
        self._release(final=True)
        if self._phase == "run":
            self._finalise_pending()
        self._est_cache = None
        return self._take()

    def _take(self) -> list[Event]:
        out, self._out = self._out, []
        return out

    # ------------------------------------------------------------ sample stage
    def _process(self, final: bool) -> None:
        n = self._n
        # a block needs one sample after it (the dropout filter looks at both neighbours)
        nb_target = -(-n // BLOCK) if final else (n - 1) // BLOCK
        if nb_target > self._nb:
            a = self._nb * BLOCK - self._t0
            b = min(nb_target * BLOCK, n) - self._t0
            lo_i, hi_i = max(a - 1, 0), min(b + 1, self._x.size)
            xs = self._x[lo_i:hi_i]
            if a == 0 and self._t0 == 0:
                xs = np.concatenate((xs[:1], xs))
            if hi_i == b:
                xs = np.concatenate((xs, xs[-1:]))
            # a single-sample dropout is raised to the lower of its neighbours, so
            # it cannot pull the baseline down (blip troughs are wider than that)
            seg = np.maximum(xs[1:-1], np.minimum(xs[:-2], xs[2:]))
            # reduceat adds in a fixed order: block means are bit-identical however chunked
            starts = np.arange(0, seg.size, BLOCK)
            means = np.add.reduceat(seg, starts) / np.minimum(BLOCK, seg.size - starts)
            self._bmb.extend(means)
            self._nb = nb_target
        if final:
            fb, F = self._nb, n
            self._finished_scan = True
        else:
            fb = self._nb - self._margin
            F = fb * BLOCK
        if F <= self._done:
            return
        if self._sigma is None:
            g_end = min(GROUP, n)
            if F < g_end:
                return
            self._init_noise(g_end)
        b0 = self._done // BLOCK
        base = self._baseline_blocks(b0, fb)
        self._bbb.extend(base)
        cands: list[tuple] = []
        revs = self._reversals(self._done, F)
        a = self._done
        while a < F:
            g = a // GROUP
            b = min(F, (g + 1) * GROUP)
            self._scan(a, b, cands, final and b == F)
            if b == (g + 1) * GROUP or (final and b == F):
                self._end_group_noise(b)
            a = b
        self._done = F
        self._events(cands, revs, F, final)
        self._trim()

    def _init_noise(self, g_end: int) -> None:
        """Noise of the first group from the first group itself (look-ahead at start only)."""
        nbl = -(-g_end // BLOCK)
        base = self._baseline_blocks(0, nbl)
        x = self._x[:g_end]
        r = x - np.repeat(base, BLOCK)[:g_end]
        neg = np.minimum(r, 0.0)
        cnt = float(np.count_nonzero(r < 0))
        sig = KAPPA * (-neg.sum() / cnt) if cnt else 0.0
        dx = np.abs(np.diff(x))
        dx = dx[dx > 0]
        q = float(dx.min()) if dx.size else 0.0
        self._floor = max(0.5 * q, 1e-12 * max(1.0, float(np.max(np.abs(x)))))
        self._sigma = max(sig, self._floor)

    def _baseline_blocks(self, b0: int, b1: int) -> np.ndarray:
        """Baseline of blocks [b0, b1): grey opening of the block means."""
        m = self._margin
        lo = max(self._bm0, b0 - m)
        hi = min(self._nb, b1 + m)
        arr = self._bm[lo - self._bm0:hi - self._bm0]
        if arr.size == 0:
            return np.zeros(0)
        o = ndimage.maximum_filter1d(ndimage.minimum_filter1d(arr, self._wb, mode="nearest"),
                                     self._wb, mode="nearest")
        return o[b0 - lo:b1 - lo]

    def _reversals(self, a: int, b: int) -> list[tuple]:
        d = self._d[a - self._t0:b - self._t0]
        prev = self._last_dir
        out = []
        if d.size:
            if prev and d[0] != prev:
                out.append(a)
            ch = np.flatnonzero(d[1:] != d[:-1]) + 1
            out.extend((a + ch).tolist())
            self._last_dir = int(d[-1])
        res = [(i, float(self._p[i - self._t0]), int(self._d[i - self._t0])) for i in out]
        self._revs.extend(i for i, _, _ in res)
        return res

    def _scan(self, a: int, b: int, cands: list, close_at_end: bool) -> None:
        """Hysteresis over samples [a, b) of one group; completed candidates -> cands."""
        t0 = self._t0
        x = self._x[a - t0:b - t0]
        ba = a // BLOCK - self._bb0
        bb = -(-b // BLOCK) - self._bb0
        base = np.repeat(self._bb[ba:bb], BLOCK)[a % BLOCK:a % BLOCK + (b - a)]
        r = x - base
        neg = np.minimum(r, 0.0)
        # per-block sums, added up once per group: independent of how samples arrive
        self._gneg.extend(np.add.reduceat(neg, np.arange(0, neg.size, BLOCK)))
        self._gacc[1] += float(np.count_nonzero(neg))
        bm = self._bm[a // BLOCK - self._bm0: -(-b // BLOCK) - self._bm0]
        bl = self._bb[ba:bb]
        if bm.size and bl.size:
            self._gmax = max(self._gmax, float(np.max(bm[:bl.size] - bl[:bm.size])))
        sig = self._sigma
        lo = self.settings["lo_sigma"] * sig
        hi = max(self.settings["hi_sigma"] * sig, self.settings["min_height"])
        m = r > lo
        ch = np.flatnonzero(m[1:] != m[:-1]) + 1
        if ch.size:
            up = m[ch]
            rises, falls = ch[up], ch[~up]
        else:
            rises = falls = ch
        if m[0] and self._open < 0:
            rises = np.concatenate(([0], rises))
        if (not m[0]) and self._open >= 0:
            falls = np.concatenate(([0], falls))
        starts = a + rises
        if self._open >= 0:
            starts = np.concatenate(([self._open], starts))
        ends = a + falls
        trig = a + np.flatnonzero(r > hi)
        if starts.size > ends.size:           # a run still open at b
            if close_at_end:
                ends = np.concatenate((ends, [b]))
                new_open = -1
            else:
                new_open = int(starts[-1])
                starts = starts[:-1]
        else:
            new_open = -1
        if starts.size:
            has = np.searchsorted(trig, starts) < np.searchsorted(trig, ends)
            if self._open >= 0 and self._open_trig:
                has[0] = True
            conf = self.settings["confirm_sigma"] * sig
            for s_, e_ in zip(starts[has].tolist(), ends[has].tolist()):
                cands.append((s_, e_, conf))
        if new_open >= 0:
            carried = new_open == self._open
            t_after = trig.size and trig[-1] >= new_open
            self._open_trig = bool(t_after) or (carried and self._open_trig)
        else:
            self._open_trig = False
        self._open = new_open

    def _end_group_noise(self, b: int) -> None:
        """Close a group: fold its noise sums into the running average."""
        acc = self._gacc
        acc[0] = -float(np.sum(np.array(self._gneg)))
        self._gneg = []
        if self._ema is None:
            self._ema = [acc[0], acc[1]]
        else:
            a = self._alpha
            self._ema = [(1 - a) * self._ema[0] + a * acc[0], (1 - a) * self._ema[1] + a * acc[1]]
        self._gacc = [0.0, 0.0]
        self._rmax = max(self._rmax, self._gmax)
        self._gmax = 0.0
        if self._ema[1] > 0:
            sig = KAPPA * self._ema[0] / self._ema[1]
        else:
            sig = self._sigma or 0.0
        self._sigma = max(sig, self._floor, 1e-3 * self._rmax)

    def _split(self, spans: list[tuple]) -> list[tuple]:
        """Cut candidate runs at every reversal inside them: each piece lies in one run.

        Returns (start, end, confirm level, cut on the left, cut on the right).
        A blip in progress at a turn (often its tail lasting into the backlash
        dead band) becomes a crossing of the old run and one of the new run.
        """
        revs = np.asarray(self._revs, np.int64)
        st = np.array([s[0] for s in spans], np.int64)
        en = np.array([s[1] for s in spans], np.int64)
        i0 = np.searchsorted(revs, st, side="right")
        i1 = np.searchsorted(revs, en - 1, side="right")
        if not (i1 > i0).any():
            return [(s, e, c, False, False) for s, e, c in spans]
        out = []
        for (s, e, c), a, b in zip(spans, i0.tolist(), i1.tolist()):
            if a == b:
                out.append((s, e, c, False, False))
                continue
            cuts = [s] + revs[a:b].tolist() + [e]
            for j in range(len(cuts) - 1):
                out.append((cuts[j], cuts[j + 1], c, j > 0, j < len(cuts) - 2))
        return out

    def _measure(self, pieces: list[tuple]) -> dict[str, np.ndarray]:
        """Centre, area, height, extent and direction of candidate runs (vectorised).

        The centre is the intensity-weighted mean position of the samples above
        half the blip's (3-point-median) maximum: the tails, a neighbour's
        overlap and a dead-band plateau after a turn do not pull it.
        """
        st = np.array([s[0] for s in pieces], np.int64)
        en = np.array([s[1] for s in pieces], np.int64)
        cut_l = np.array([s[3] for s in pieces], bool)
        cut_r = np.array([s[4] for s in pieces], bool)
        ln = en - st
        tot = int(ln.sum())
        cs = np.concatenate(([0], np.cumsum(ln)[:-1]))
        idx = np.repeat(st - cs, ln) + np.arange(tot)
        t0 = self._t0
        lastx = t0 + self._x.size - 1

        def r_at(i):
            # reflect at the ends of the stream, so an edge sample is its own neighbour never
            i = np.where(i < 0, 1, i)
            i = np.where((i > lastx) & self._finished_scan, lastx - 1, i)
            i = np.clip(i, t0, lastx)
            return self._x[i - t0] - self._bb[i // BLOCK - self._bb0]

        r0 = r_at(idx)
        rm, rp = r_at(idx - 1), r_at(idx + 1)
        med = np.maximum(np.minimum(rm, r0), np.minimum(np.maximum(rm, r0), rp))
        hraw = np.maximum.reduceat(r0, cs)
        hmed = np.maximum.reduceat(med, cs)
        half = np.repeat(0.5 * hmed, ln)
        w = np.maximum(med - half, 0.0)
        pos = self._p[idx - t0]
        ref = pos[cs]
        q = pos - np.repeat(ref, ln)
        sw = np.add.reduceat(w, cs)
        swp = np.add.reduceat(w * q, cs)
        above = med >= half
        pmin = np.minimum.reduceat(np.where(above, pos, np.inf), cs)
        pmax = np.maximum.reduceat(np.where(above, pos, -np.inf), cs)
        step = np.abs(self._p[en - 1 - t0] - self._p[st - t0]) / np.maximum(ln - 1, 1)
        safe = np.where(sw > 0, sw, 1.0)
        cen = np.where(sw > 0, swp / safe, q[cs])
        # peak: first sample of each run reaching its raw maximum
        hit = np.flatnonzero(r0 == np.repeat(hraw, ln))
        seg_of_hit = np.searchsorted(cs, hit, side="right") - 1
        first = np.unique(seg_of_hit, return_index=True)[1]
        peak = idx[hit[first]]
        height = np.where(hraw <= 2.5 * hmed, hraw, hmed)
        # a piece whose maximum sits at a cut was never crossed completely
        partial = (cut_l & (peak - st <= 1)) | (cut_r & (en - 1 - peak <= 1))
        return {"start": st, "end": en, "peak": peak, "pos": ref + cen, "area": sw,
                "height": height, "hmed": hmed, "d": self._d[st - t0].astype(np.int64),
                "partial": partial, "pmin": pmin, "pmax": pmax, "step": step}

    # ------------------------------------------------------------- event stage
    def _events(self, spans: list[tuple], revs: list[tuple], F: int, final: bool) -> None:
        """Run the up/down counter over the new candidates and reversals, in time order."""
        items: list[tuple] = []
        if spans:
            pieces = self._split(spans)
            c = self._measure(pieces)
            # single-sample spikes fail here: their 3-point median stays in the noise
            conf = np.array([s[2] for s in pieces])
            keep = np.flatnonzero(c["hmed"] > conf)
            cols = [c[f][keep].tolist() for f in _CFIELDS]
            items.extend((row[1], 0, "c", row) for row in zip(*cols))
        items.extend((r[0], 1, "r", r) for r in revs)
        # group ends in this batch, for spacing updates (after their candidates)
        for g in range(self._done_events // GROUP + 1, F // GROUP + 1):
            items.append((g * GROUP, 2, "g", g))
        self._done_events = F
        items.sort(key=lambda t: (t[0], t[1]))
        block: list[tuple] = []
        for _, _, kind, obj in items:
            if kind == "c":
                block.append(obj)
                continue
            if block:
                self._dispatch_cands(block)
                block = []
            if kind == "r":
                self._dispatch_rev(obj)
            elif self._phase != "run":
                self._held.append(["g", obj])
            else:
                self._end_group_spacing()
        if block:
            self._dispatch_cands(block)
        if self._phase != "run":
            self._release(final=False)

    # ---- dispatch (holding while the spacing or the first alignment is unknown)
    def _dispatch_cands(self, rows: list[tuple]) -> None:
        if self._phase != "run":
            self._held.extend(["c", r] for r in rows)
            self._release(final=False)
            return
        self._run_cands(rows)

    def _dispatch_rev(self, rev: tuple) -> None:
        if self._phase != "run":
            self._held.append(["r", rev])
            self._release(final=False)
            return
        self._on_reversal(rev)

    def _release(self, final: bool) -> None:
        """Decide held items once enough are in, then replay them in order.

        Holding is decided by the data alone (candidate counts, travel), and
        the held items (candidates, reversals, group ends) replay in stream
        order, so when a release happens never changes what it yields.
        """
        if self._phase == "init":
            runs, cur = [], []
            for kind, obj in self._held:
                if kind == "c":
                    cur.append(obj)
                elif kind == "r":
                    runs.append(cur)
                    cur = []
            runs.append(cur)
            if not final and max(len(r) for r in runs) < N_INIT:
                return
            S, periods = initial_spacing([np.array([o[3] for o in r]) for r in runs],
                                         [np.array([o[4] for o in r]) for r in runs])
            if not final and (S is None or periods < 4) and sum(map(len, runs)) < 200:
                return
            self._S = S
            allc = [o for r in runs for o in r]
            if allc:
                self._wtyp = float(np.median([o[9] - o[8] + o[10] for o in allc]))
                self._htyp = float(np.median([o[5] for o in allc]))
        elif self._phase == "align":
            has_rev = any(kind == "r" for kind, _ in self._held)
            idx, rpos, newdir = self._lastrev
            latest = float(self._p[self._done - 1 - self._t0])
            travel = newdir * (latest - rpos)
            if not final and not has_rev and travel < FIT_TRAVEL * self._S:
                return
            self._b = self._fit_backlash(has_rev or final)
        else:
            return
        held, self._held = self._held, []
        self._phase = "run"
        i = 0
        while i < len(held):
            kind, obj = held[i]
            if self._phase != "run":          # a replayed reversal started holding again
                self._held.extend(held[i:])
                break
            if kind == "c":
                j = i
                while j < len(held) and held[j][0] == "c":
                    j += 1
                self._run_cands([h[1] for h in held[i:j]])
                i = j
                continue
            if kind == "r":
                self._on_reversal(obj)
            else:
                self._end_group_spacing()
            i += 1
        if self._held:
            self._release(final)

    # ---- the up/down counter
    def _first_after_reversal(self, pos: float, d: int) -> int:
        """Mode index of the first (non-weak) crossing of a fresh run."""
        L, S = self._L, self._S
        if L is None:
            return 0
        if S is None:
            return L["k"] + (d if d == L["side"] else 0)
        if d == L["side"]:
            # same direction as the last crossing: positions compare directly
            n = int(np.rint(d * (pos - L["cent"]) / S))
        elif self._b is not None:
            # back the other way: the last mode reappears shifted by the backlash
            e = L["cent"] - L["side"] * self._b
            n = int(np.rint(d * (pos - e) / S))
        else:
            n = 0
        return L["k"] + d * n

    def _weak(self, width, height, partial_all):
        """Crossings too narrow or weak to be a mode on their own (kick glimpses, cut tails)."""
        weak = np.asarray(partial_all, bool).copy()
        if self._wtyp:
            weak |= np.asarray(width) < WEAK_WIDTH * self._wtyp
        if self._htyp:
            weak |= np.asarray(height) < WEAK_HEIGHT * self._htyp
        return weak

    def _run_cands(self, rows: list[tuple]) -> None:
        i = 0
        while i < len(rows):
            P = self._P
            if P is None or P["fresh"] or not self._S:
                self._one(rows[i])
                i += 1
            else:
                self._merge_block(rows[i:])
                return

    def _new_pending(self, row: tuple, k: int, fresh: bool, anc_k, anc_cent, n: int) -> dict:
        main = not self._htyp or row[5] >= MAIN_HEIGHT * self._htyp
        return {"k": int(k), "d": int(row[6]), "ref": float(row[3]), "sw": float(row[4]),
                "swp": 0.0, "last": float(row[3]), "h": float(row[5]), "peak": int(row[2]),
                "hasmain": bool(main),
                "start": int(row[0]), "end": int(row[1]), "parts": 1, "npartial": int(bool(row[7])),
                "pmin": float(row[8]), "pmax": float(row[9]), "stepsum": float(row[10]),
                "fresh": bool(fresh), "anc_k": anc_k, "anc_cent": anc_cent, "n": int(n),
                "deadband": False}

    def _one(self, row: tuple) -> None:
        """One candidate, in Python: used right after a reversal and at the very start."""
        P, S, d = self._P, self._S, int(row[6])
        main = not self._htyp or row[5] >= MAIN_HEIGHT * self._htyp
        if (P is not None and S and d == P["d"] and d * (row[3] - P["last"]) < self._f * S
                and d * (row[3] - P["ref"]) < MAX_SPAN * S):
            P["hasmain"] = P["hasmain"] or bool(main)
            P["sw"] += row[4]
            P["swp"] += row[4] * (row[3] - P["ref"])
            P["last"] = float(row[3])
            if row[5] > P["h"]:
                P["h"], P["peak"] = float(row[5]), int(row[2])
            P["end"] = max(P["end"], int(row[1]))
            P["parts"] += 1
            P["npartial"] += int(bool(row[7]))
            P["pmin"], P["pmax"] = min(P["pmin"], row[8]), max(P["pmax"], row[9])
            P["stepsum"] += row[10]
            return
        was_fresh = P is not None and P["fresh"]
        weak = self._finalise_pending() if P is not None else None
        if P is None or (was_fresh and weak) or d != P["d"]:
            k = self._first_after_reversal(row[3], d)
            self._P = self._new_pending(row, k, True, None, None, 0)
            if self._b is not None and self._lastrev is not None and self._S:
                # still inside the dead band after the turn: the mount has not
                # moved yet, this is the old blip's tail, not a crossing
                travel = d * (row[3] - self._lastrev[1])
                if travel < self._b - 0.1 * self._S:
                    self._P["deadband"] = True
            return
        # same run, same direction: number from the anchor (the last non-weak crossing)
        if weak:
            anc_k, anc_cent = P["anc_k"], P["anc_cent"]
        else:
            anc_k, anc_cent = P["k"], P["cent"]
        if anc_cent is None:
            anc_k, anc_cent = P["k"], P["cent"]
        n = max(1, int(np.rint(d * (row[3] - anc_cent) / S))) if S else 1
        self._P = self._new_pending(row, anc_k + d * n, False, anc_k, anc_cent, n)

    def _merge_block(self, rows: list[tuple]) -> None:
        """Vectorised: merge candidates into crossings and number them (one run, one direction)."""
        P, S, f = self._P, self._S, self._f
        d = P["d"]
        cols = list(zip(*rows))
        start = np.array(cols[0], np.int64)
        end = np.array(cols[1], np.int64)
        peak = np.array(cols[2], np.int64)
        pos = np.array(cols[3], float)
        area = np.array(cols[4], float)
        h = np.array(cols[5], float)
        dd = np.array(cols[6], np.int64)
        partial = np.array(cols[7], bool)
        pmin = np.array(cols[8], float)
        pmax = np.array(cols[9], float)
        stp = np.array(cols[10], float)
        if (dd != d).any():       # a direction change without a reversal event: go slowly
            for r in rows:
                self._one(r)
            return
        main = h >= MAIN_HEIGHT * self._htyp if self._htyp else np.ones(h.size, bool)
        last = np.concatenate(([P["last"]], pos[:-1]))
        new = d * (pos - last) >= f * S
        cid = np.cumsum(new)
        # no crossing spans more than MAX_SPAN spacings from its first candidate
        firsts = np.concatenate(([P["ref"]], pos[new]))
        over = d * (pos - firsts[cid]) >= MAX_SPAN * S
        if over.any():
            new = new.copy()
            for c in np.unique(cid[over]).tolist():
                first = float(firsts[c])
                for i in np.flatnonzero(cid == c).tolist():
                    if d * (pos[i] - first) >= MAX_SPAN * S:
                        new[i] = True
                        first = float(pos[i])
            cid = np.cumsum(new)
        m = int(cid[-1])
        # sums per crossing, each referred to its own first candidate and added in
        # stream order (P's partial sums first), so the result is bit-identical
        # to merging one candidate at a time however the stream was chunked
        firsts = np.concatenate(([P["ref"]], pos[new]))
        q = pos - firsts[cid]
        ids = np.concatenate(([0], cid))

        def seqsum(p0, w):
            return np.bincount(ids, weights=np.concatenate(([p0], w)), minlength=m + 1)

        sw = seqsum(P["sw"], area)
        swp = seqsum(P["swp"], area * q)
        parts = np.bincount(cid, minlength=m + 1)
        parts[0] += P["parts"]
        npart = np.bincount(cid, weights=partial.astype(float), minlength=m + 1)
        npart[0] += P["npartial"]
        ssum = seqsum(P["stepsum"], stp)
        cmin = np.full(m + 1, np.inf)
        cmax = np.full(m + 1, -np.inf)
        np.minimum.at(cmin, cid, pmin)
        np.maximum.at(cmax, cid, pmax)
        cmin[0] = min(cmin[0], P["pmin"])
        cmax[0] = max(cmax[0], P["pmax"])
        cen = firsts + np.where(sw > 0, swp / np.where(sw > 0, sw, 1.0), 0.0)
        width = np.maximum(cmax - cmin, 0.0) + ssum / parts
        hmax = np.full(m + 1, -np.inf)
        np.maximum.at(hmax, cid, h)
        pk = np.full(m + 1, -1, np.int64)
        is_top = h == hmax[cid]
        top_c, top_i = np.unique(cid[is_top], return_index=True)
        pk[top_c] = peak[np.flatnonzero(is_top)[top_i]]
        if P["h"] >= hmax[0]:
            hmax[0], pk[0] = P["h"], P["peak"]
        cend = np.zeros(m + 1, np.int64)
        np.maximum.at(cend, cid, end)
        cend[0] = max(cend[0], P["end"])
        if m == 0:
            P.update(sw=float(sw[0]), swp=float(swp[0]), last=float(pos[-1]), h=float(hmax[0]),
                     hasmain=P["hasmain"] or bool(main.any()),
                     peak=int(pk[0]), end=int(cend[0]), parts=int(parts[0]),
                     npartial=int(npart[0]), pmin=float(cmin[0]), pmax=float(cmax[0]),
                     stepsum=float(ssum[0]))
            return
        newi = np.flatnonzero(new)
        cstart = np.concatenate(([P["start"]], start[newi]))
        nmain = np.bincount(cid, weights=main.astype(float), minlength=m + 1)
        nmain[0] += P["hasmain"]
        weak = self._weak(width[:m], hmax[:m], npart[:m] >= parts[:m]) | (nmain[:m] == 0)
        weak[0] |= P["deadband"]
        nw = ~weak
        # anchor of cluster j (1..m): the last non-weak cluster before it (-1: P's own anchor)
        anc = np.maximum.accumulate(np.where(nw, np.arange(m), -1))
        base_k, base_c = P["anc_k"], P["anc_cent"]
        if base_c is None:
            base_k, base_c = P["k"], float(cen[0])
        anc_cent = np.where(anc >= 0, cen[np.maximum(anc, 0)], base_c)
        first = pos[newi]
        nstep = np.maximum(1, np.rint(d * (first - anc_cent) / S)).astype(np.int64)
        # k along the chain of non-weak clusters, then every cluster from its anchor
        kmap = np.zeros(m, np.int64)
        kmap[0] = P["k"]
        chain = np.flatnonzero(nw[1:]) + 1
        if chain.size:
            k0 = P["k"] if nw[0] else base_k
            kmap[chain] = k0 + d * np.cumsum(nstep[chain - 1])
        anc_k = np.where(anc >= 0, kmap[np.maximum(anc, 0)], base_k)
        ks = np.concatenate(([P["k"]], anc_k + d * nstep))
        # spacings between non-weak crossings, for the running spacing
        gcen = np.concatenate(([np.nan if P["anc_cent"] is None else P["anc_cent"]], anc_cent[:m - 1]))
        gn = np.concatenate(([max(P["n"], 1)], nstep[:m - 1]))
        gaps = d * (cen[:m] - gcen) / gn
        if P["fresh"]:
            gaps[0] = np.nan
        good = nw & np.isfinite(gaps)
        self._push_gaps(gaps[good], gn[good])
        self._emit(ks[:m], pk[:m], cstart[:m], cend[:m], cen[:m], d, hmax[:m], width[:m],
                   sw[:m], parts[:m], weak)
        self._P = {"k": int(ks[m]), "d": d, "ref": float(firsts[m]), "sw": float(sw[m]),
                   "swp": float(swp[m]), "last": float(pos[-1]), "h": float(hmax[m]),
                   "hasmain": bool(nmain[m] > 0),
                   "peak": int(pk[m]), "start": int(cstart[m]), "end": int(cend[m]),
                   "parts": int(parts[m]), "npartial": int(npart[m]), "pmin": float(cmin[m]),
                   "pmax": float(cmax[m]), "stepsum": float(ssum[m]), "fresh": False,
                   "anc_k": int(anc_k[m - 1]), "anc_cent": float(anc_cent[m - 1]),
                   "n": int(nstep[m - 1]), "deadband": False}

    def _push_gaps(self, gaps: np.ndarray, ns: np.ndarray) -> None:
        if gaps.size:
            self._gaps.extend(gaps.tolist())
            self._ns.extend(np.asarray(ns).tolist())
            del self._gaps[:-GAP_MEMORY]
            del self._ns[:-GAP_MEMORY]
            self._gaps_new = True

    def _finalise_pending(self) -> bool | None:
        """Close the open crossing; returns whether it was weak (None if there was none)."""
        P = self._P
        if P is None:
            return None
        self._P = None
        cen = P["ref"] + (P["swp"] / P["sw"] if P["sw"] > 0 else 0.0)
        P["cent"] = cen
        width = max(P["pmax"] - P["pmin"], 0.0) + P["stepsum"] / P["parts"]
        weak = (bool(self._weak([width], [P["h"]], [P["npartial"] >= P["parts"]])[0])
                or P["deadband"] or not P["hasmain"])
        if not weak and P["anc_cent"] is not None and not P["fresh"] and P["n"] >= 1:
            self._push_gaps(np.array([P["d"] * (cen - P["anc_cent"]) / P["n"]]), np.array([P["n"]]))
        self._emit(np.array([P["k"]]), np.array([P["peak"]]), np.array([P["start"]]),
                   np.array([P["end"]]), np.array([cen]), P["d"], np.array([P["h"]]),
                   np.array([width]), np.array([P["sw"]]), np.array([P["parts"]]),
                   np.array([weak]))
        return weak

    def _emit(self, ks, peaks, starts, ends, cens, d, hs, ws, areas, parts, weak) -> None:
        n = len(ks)
        if n == 0:
            return
        kl = np.asarray(ks, np.int64).tolist()
        cl = np.asarray(cens, float).tolist()
        hl = np.asarray(hs, float).tolist()
        wl = np.asarray(ws, float).tolist()
        weak = np.asarray(weak, bool)
        self._out.extend(map(Event, ["blip"] * n, np.asarray(peaks, np.int64).tolist(), cl,
                             [int(d)] * n, kl, hl, wl))
        self._table.add(ks, np.full(n, d), cens, hs, ws, ~weak)
        self._records.append({"mode": np.asarray(ks, np.int64), "index": np.asarray(peaks, np.int64),
                              "start": np.asarray(starts, np.int64), "end": np.asarray(ends, np.int64),
                              "position_steps": np.asarray(cens, float), "direction": np.full(n, d),
                              "height": np.asarray(hs, float), "width_steps": np.asarray(ws, float),
                              "area": np.asarray(areas, float), "parts": np.asarray(parts, np.int64),
                              "weak": weak.copy(), "run": np.full(n, self._run)})
        self._n_cross += n
        self._run_cur.append([kl, cl, hl, int(d), (~weak).tolist()])
        strong = np.flatnonzero(~weak)
        if strong.size:
            i = int(strong[-1])
            self._L = {"k": kl[i], "cent": cl[i], "side": int(d), "h": hl[i]}
            self._wrec.extend(np.asarray(ws, float)[strong].tolist())
            self._hrec.extend(np.asarray(hs, float)[strong].tolist())
            del self._wrec[:-GAP_MEMORY]
            del self._hrec[:-GAP_MEMORY]
        elif self._L is None:
            self._L = {"k": kl[-1], "cent": cl[-1], "side": int(d), "h": hl[-1]}
        self._est_cache = None

    def _on_reversal(self, rev: tuple) -> None:
        idx, pos, newdir = rev
        self._finalise_pending()
        kl = self._L["k"] if self._L else 0
        self._out.append(Event("reversal", int(idx), float(pos), int(newdir), int(kl), 0.0, 0.0))
        pairs = self._pairs(self._run_cur, self._run_prev)
        if pairs.size:
            self._bpairs.extend(pairs.tolist())
            del self._bpairs[:-64]
            self._b = float(np.median(pairs)) if pairs.size >= 3 else float(np.median(self._bpairs))
        if self._run_cur:
            self._run_prev = self._run_cur
        self._run_cur = []
        self._run += 1
        self._lastrev = (int(idx), float(pos), int(newdir))
        if self._b is None and self._L is not None and self._S:
            self._phase = "align"

    @staticmethod
    def _flat(run: list) -> list[tuple]:
        """(k, centre, height, direction, reliable) for every crossing of a run."""
        out = []
        for ks, cs, hs, d, rel in run:
            out.extend((k, c, h, d, r) for k, c, h, r in zip(ks, cs, hs, rel))
        return out

    def _pairs(self, cur: list, prev: list) -> np.ndarray:
        """Backlash estimates d * (centre in this run - centre in the previous run), per mode."""
        if not cur or not prev:
            return np.zeros(0)
        pm = {k: (c, d) for k, c, _, d, rel in self._flat(prev) if rel}
        out = [d * (c - pm[k][0]) for k, c, _, d, rel in self._flat(cur)
               if rel and k in pm and pm[k][1] == -d]
        return np.array(out)

    def _fit_backlash(self, short: bool) -> float | None:
        """Backlash at the first reversal, from the signal alone.

        After a turn the mount stands still for b steps (the dead band), then
        retraces: the new run shows the old run's signal at commanded position
        p + b (old side), frozen at the turning point while in the dead band.
        The frozen stretch is what tells b apart from b +- one spacing. Fitted
        on the samples over a travel of FIT_TRAVEL spacings; None when the
        data cannot decide (then the order of crossings alone is used).
        """
        idx, rpos, newdir = self._lastrev
        S = self._S
        side = -newdir
        t0 = self._t0
        prev_rev = [r for r in self._revs if r < idx]
        start_old = max(t0, prev_rev[-1] if prev_rev else t0)
        later = [r for r in self._revs if r > idx]
        stop_new = min(self._done, later[0]) if later else self._done
        op, ov = self._p[start_old - t0:idx - t0], self._x[start_old - t0:idx - t0]
        np_, nv = self._p[idx - t0:stop_new - t0], self._x[idx - t0:stop_new - t0]
        travel = side * (rpos - np_)
        sel = (travel >= 0) & (travel <= FIT_TRAVEL * S)
        np_, nv, travel = np_[sel], nv[sel], travel[sel]
        oks = side * (rpos - op) <= (FIT_TRAVEL + 4) * S
        op, ov = op[oks], ov[oks]
        if np_.size < 8 or op.size < 8:
            return None
        order = np.argsort(op)
        op, ov = op[order], ov[order]
        bmax = min(float(travel.max()) - 0.5 * S, 3.0 * S)
        if bmax <= 0:
            return None
        grid = np.arange(0.0, bmax, max(S / 60.0, 0.1))
        q = np_[None, :] + side * grid[:, None]
        q = np.where(side * (q - rpos) > 0, rpos, q)
        pred = np.interp(q, op, ov)
        res = nv[None, :] - pred
        res -= res.mean(axis=1, keepdims=True)
        J = np.mean(res * res, axis=1)
        i = int(np.argmin(J))
        far = np.abs(grid - grid[i]) > 0.3 * S
        if not far.any() or J[far].min() < 1.5 * J[i]:
            return None
        return float(grid[i])

    def _end_group_spacing(self) -> None:
        """At a group end: running spacing and typical width/height from recent crossings."""
        if self._wrec:
            self._wtyp = float(np.median(self._wrec))
            self._htyp = float(np.median(self._hrec))
        if not self._gaps_new or not self._gaps:
            return
        self._gaps_new = False
        g = np.array(self._gaps)
        ns = np.array(self._ns)
        if len(ns) >= 8 and np.median(ns) >= 2:
            # every step spans several spacings: the spacing estimate is a fraction too small
            self._S = float(np.median(g * ns))
            self._gaps, self._ns = [self._S], [1]
            return
        self._S = float(np.median(g))

    def _trim(self) -> None:
        keep_from = self._done - 2
        if self._open >= 0:
            keep_from = min(keep_from, self._open - 2)
        if self._b is None and self._S is not None:
            # until the backlash is known, keep the last two runs for the fit
            run_from = self._revs[-2] if len(self._revs) >= 2 else 0
            keep_from = min(keep_from, max(run_from, self._done - MAX_RUN_SAMPLES))
        keep_from = max(keep_from, self._t0)
        cut = keep_from - self._t0
        if cut > 4 * GROUP:
            self._xb.drop(cut)
            self._pb.drop(cut)
            self._db.drop(cut)
            self._t0 = keep_from
        bkeep = max(self._bm0, min(self._t0 // BLOCK, self._done // BLOCK - self._margin - 2))
        if bkeep - self._bm0 > 4 * GROUP // BLOCK:
            self._bmb.drop(bkeep - self._bm0)
            self._bm0 = bkeep
        bbkeep = max(self._bb0, self._t0 // BLOCK)
        if bbkeep - self._bb0 > 4 * GROUP // BLOCK:
            self._bbb.drop(bbkeep - self._bb0)
            self._bb0 = bbkeep
        if len(self._revs) > 64:
            self._revs = self._revs[-64:]

    # views of the buffers
    @property
    def _x(self) -> np.ndarray:
        return self._xb.a

    @property
    def _p(self) -> np.ndarray:
        return self._pb.a

    @property
    def _d(self) -> np.ndarray:
        return self._db.a

    @property
    def _bm(self) -> np.ndarray:
        return self._bmb.a

    @property
    def _bb(self) -> np.ndarray:
        return self._bbb.a

    # ------------------------------------------------------------- read-outs
    @property
    def modes(self) -> int:
        """Distinct modes crossed so far (the crossing still open to merging included)."""
        seen = set(np.flatnonzero(self._table.seen > 0) + self._table.off)
        if self._P is not None:
            seen.add(self._P["k"])
        return len(seen)

    @property
    def crossings(self) -> int:
        """Every crossing counted, all passes (a split blip or a kick's repeat is one)."""
        return self._n_cross + (1 if self._P is not None else 0)

    @property
    def spacing_steps(self) -> float | None:
        """The running spacing the counter works with (None until learnt)."""
        return self._S

    def mode_centres(self) -> dict[str, np.ndarray]:
        """Per-mode means: k, centre up / down (NaN if never crossed that way), counts, height, width."""
        t = self._table
        k = np.arange(t.seen.size) + t.off
        with np.errstate(invalid="ignore", divide="ignore"):
            up = t.sum[0] / t.cnt[0]
            dn = t.sum[1] / t.cnt[1]
            h = t.hsum / t.seen
            w = t.wsum / t.seen
        sel = t.seen > 0
        return {"mode": k[sel], "centre_up": up[sel], "centre_down": dn[sel],
                "n_up": t.cnt[0][sel], "n_down": t.cnt[1][sel], "crossings": t.seen[sel],
                "height": h[sel], "width_steps": w[sel]}

    def estimate(self) -> dict:
        """modes, crossings, spacing_steps (+ _u) and backlash_steps from the mode table.

        Cheap (one small least-squares fit over the modes, cached until the
        next crossing), so a dashboard can call it several times a second.
        """
        key = (self._n_cross, None if self._P is None else self._P["k"])
        if self._est_cache is not None and self._est_cache[0] == key:
            return dict(self._est_cache[1])
        mc = self.mode_centres()
        backlash, mech = mechanical_centres(mc)
        ok = np.isfinite(mech)
        sp, su, _ = fit_spacing(mc["mode"][ok], mech[ok], mc["n_up"][ok] + mc["n_down"][ok])
        if sp is None and self._S:
            sp = self._S
        out = {"modes": self.modes, "crossings": self.crossings,
               "spacing_steps": sp, "spacing_steps_u": su, "backlash_steps": backlash}
        self._est_cache = (key, out)
        return dict(out)

    def crossing_table(self) -> dict[str, np.ndarray]:
        """Every finalised crossing since this counter was made (or restored), as columns."""
        if not self._records:
            return {f: np.zeros(0) for f in _RFIELDS}
        return {f: np.concatenate([r[f] for r in self._records]) for f in _RFIELDS}

    # ---------------------------------------------------------------- state
    _STATE_ARRAYS = ("_x", "_p", "_d", "_bm", "_bb")
    _STATE_PLAIN = ("_t0", "_n", "_done", "_last_dir", "_last_in", "_bm0", "_nb", "_bb0",
                    "_sigma", "_floor", "_ema", "_gacc", "_gneg", "_rmax", "_gmax", "_open", "_open_trig",
                    "_revs", "_finished", "_done_events", "_S", "_phase", "_held", "_lastrev",
                    "_P", "_L", "_gaps", "_ns", "_gaps_new", "_wtyp", "_htyp", "_wrec", "_hrec",
                    "_b", "_bpairs", "_run",
                    "_run_cur", "_run_prev", "_n_cross")

    def get_state(self) -> dict:
        """Everything needed to continue exactly where this counter is (JSON-serialisable).

        The per-crossing table for offline analysis is not included (the run
        log holds the samples); the mode table is.
        """
        st: dict[str, Any] = {"version": 1, "settings": dict(self.settings)}
        for name in self._STATE_ARRAYS:
            a = getattr(self, name)
            st[name] = a.tolist()
        for name in self._STATE_PLAIN:
            st[name] = _plain(getattr(self, name))
        st["_table"] = self._table.to_state()
        st["_pending_events"] = [e.to_dict() for e in self._out]
        return st

    @classmethod
    def from_state(cls, state: dict) -> "StreamCounter":
        """A counter that continues from ``get_state()`` exactly as the original would."""
        if state.get("version") != 1:
            raise ValueError(f"counter state version {state.get('version')!r} is not supported")
        c = cls(state["settings"])
        c._xb = _Buf(np.float64, state["_x"])
        c._pb = _Buf(np.float64, state["_p"])
        c._db = _Buf(np.int8, state["_d"])
        c._bmb = _Buf(np.float64, state["_bm"])
        c._bbb = _Buf(np.float64, state["_bb"])
        for name in cls._STATE_PLAIN:
            setattr(c, name, state[name])
        c._held = [[kind, tuple(obj)] for kind, obj in c._held]
        c._table = _ModeTable.from_state(state["_table"])
        c._out = [Event(**e) for e in state["_pending_events"]]
        return c


def _plain(v: Any) -> Any:
    """Deep copy into JSON types (tuples become lists, numpy scalars Python numbers)."""
    if isinstance(v, dict):
        return {k: _plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    if isinstance(v, np.ndarray):
        return v.tolist()
    if isinstance(v, np.generic):
        return v.item()
    return v


def mechanical_centres(mc: dict) -> tuple[float | None, np.ndarray]:
    """Backlash (median up-minus-down centre offset) and one centre per mode.

    The mechanical centre is the mean of the up and down centres (or one of
    them moved by half the backlash), i.e. the position the mode would have
    with the play of the mount split evenly between the directions.
    """
    up, dn = mc["centre_up"], mc["centre_down"]
    both = np.isfinite(up) & np.isfinite(dn)
    backlash = float(np.median(up[both] - dn[both])) if both.any() else None
    b2 = 0.0 if backlash is None else backlash / 2
    nu, nd = mc["n_up"], mc["n_down"]
    with np.errstate(invalid="ignore", divide="ignore"):
        mech = np.where(both, ((up - b2) * nu + (dn + b2) * nd) / (nu + nd),
                        np.where(np.isfinite(up), up - b2, dn + b2))
    if backlash is None and np.isfinite(up).any() and np.isfinite(dn).any():
        # both directions seen but never the same mode: keep the larger set only
        keep_up = np.isfinite(up).sum() >= np.isfinite(dn).sum()
        mech = np.where(np.isfinite(up) if keep_up else np.isfinite(dn), mech, np.nan)
    return backlash, mech
