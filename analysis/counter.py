"""The streaming mode counter: samples in, counted chip modes out.

Signal stage (per batch of up to BATCH = 131072 samples; its per-sample loops are
compiled, see signal_kernels.py):
  * baseline: a grey opening (sliding minimum, then maximum) of 8-sample block
    means over ``baseline_window`` samples, single-sample dropouts filled in
    first; it runs under blips as wide as the spacing and follows drift;
  * noise: the mean excursion below that baseline (clipped at 4 sigma, so
    spikes and dropouts do not inflate it), averaged over ``noise_window``
    samples and updated every 8192 samples; blips only push the signal up;
  * hysteresis: a candidate is a run of samples above ``lo_sigma`` that reaches
    ``hi_sigma``; its 3-point median must reach ``confirm_sigma`` too, so a
    single-sample spike never counts; a run holding two blips (a valley
    below half of both peaks) is split;
  * each candidate: centre = intensity-weighted position of the samples above
    half its maximum (sub-step), height, width; runs are cut at reversals.

Event stage (an up/down counter; the loop over candidates within a run is
compiled, see crossing_kernels.py; Python per reversal):
  * same-direction candidates closer than ``merge_fraction`` of the spacing
    (and within 0.65 spacing of the first) are one crossing: split blips, a
    stick-slip kick seeing a blip again;
  * moving on, the mode index advances by the number of spacings from the
    last trusted crossing (a missed blip leaves a gap, not a shift);
  * after a reversal the first crossing is the mode last crossed, shifted by
    the backlash; the backlash is fitted from the signal at the first turn
    (the mount stands still through the dead band, which tells b from
    b +- one spacing), then from the up/down offsets of each mode;
  * weak crossings (crossed only partly: above half height at a turn or at
    an end of the stream; in the dead band; much narrower than typical; a
    repeat of the last mode; low and off the mode lattice, like a kick's
    glimpse) are numbered but never anchor the numbering nor make a mode
    alone. ``modes`` counts trusted crossings' modes, ``crossings`` all.

Every decision depends only on the samples, never on how they were chunked or
when the work ran, so any chunking, and a resume from ``get_state()``, gives
the same events (tests check this exactly).
"""
from __future__ import annotations

import math
import time
from itertools import repeat
from typing import Any, NamedTuple

import numpy as np

from analysis import crossing_kernels as ck
from analysis import signal_kernels as kern
from analysis.counter_settings import BLOCK, GROUP, NOISE_STRIDE, SETTINGS, validate_settings
from analysis.first_spacing import initial_spacing
from analysis.mode_table import ModeTable
from analysis.modefit import fit_spacing, mechanical_centres
from analysis.sample_buffer import SampleBuffer

INIT_NOISE = 2048    # samples the first noise level is taken from
NOISE_CLIP = 4.0     # excursions below the baseline count at most this many sigma
EVENT_GROUP = 65536  # samples per update of the running spacing and typical blip
BATCH = 131072       # samples the work waits for (or max_latency_s), see StreamCounter;
                     # also the most done in one pass: a batch's samples and positions
                     # (2 MB) stay in cache through its passes (262144: 12 % slower)
CHUNK_ROOM = 16384   # places kept free for the next chunks after a trim (see SampleBuffer.make_room)
EVENT_MIN = 64       # candidates that wait to be counted together (see max_latency_s)
N_INIT = 12          # candidates in one run before the spacing is first estimated
INIT_COUNTS = (12, 24, 48, 96, 192)   # candidate counts at which that is tried
GAP_MEMORY = 24      # recent spacings the running spacing is the median of
MAX_RUN_SAMPLES = 65536   # samples of the runs kept for the first backlash fit
FIT_TRAVEL = 4.0     # spacings travelled after the first reversal before the backlash fit
WEAK_WIDTH = 0.3     # a crossing narrower than this fraction of the typical width is
                     # "weak": numbered, never the anchor of the numbering, no mode alone
MAIN_HEIGHT = 0.35   # ... and so is one lower than this fraction of the typical height
OFF_LATTICE = 0.25   # ... that lies more than this many spacings off the mode lattice;
GLIMPSE_WIDTH = 0.6  # so is one off the lattice and narrower than this (of typical)
MAX_SPAN = 0.65      # a crossing never spans more than this many spacings
# mean |negative excursion| below the baseline -> noise sigma; calibrated on
# white Gaussian noise against the default baseline window (see tests).
KAPPA = 1.53


class Event(NamedTuple):
    """A counted crossing of a mode ("blip") or a change of direction ("reversal").

    ``index`` is the sample index in the whole stream (the blip's peak);
    ``position_steps`` the blip centre (intensity-weighted, sub-step) or the
    reversal point; ``mode`` the mode index (for a reversal: the last mode
    crossed); ``height`` above baseline in detector units; ``width_steps`` the
    Gaussian-equivalent FWHM from the blip's second moment. A tuple: a night
    has hundreds of thousands of them, and tuples are the cheapest to make.
    """

    kind: str
    index: int
    position_steps: float
    direction: int
    mode: int
    height: float
    width_steps: float

    def to_dict(self) -> dict:
        return self._asdict()


# Candidate fields, in the order of a candidate tuple / array columns.
_CFIELDS = ("start", "end", "peak", "pos", "area", "height", "d", "partial", "pmin", "pmax", "step")
# Finalised crossing record columns (kept for the offline analysis, not in the state).
_RFIELDS = ("mode", "index", "start", "end", "position_steps", "direction", "height",
            "width_steps", "area", "parts", "weak", "run")


_new_tuple = tuple.__new__

# direction dtypes the compiled chunk check takes as they are (build_kernels.EXPORTS)
_CHECKED_DIRECTIONS = (np.dtype(np.int8), np.dtype(np.int64), np.dtype(np.float64))
_F8 = np.dtype(np.float64)


def _median(v) -> float:
    """Median of a short list (sorted in Python: cheaper than numpy for a few dozen values)."""
    s = sorted(v)
    n = len(s)
    return float(s[n // 2]) if n % 2 else 0.5 * (float(s[n // 2 - 1]) + float(s[n // 2]))


class StreamCounter:
    """Counts chip modes in a stream of (commanded position, direction, value) samples.

    ``feed`` only stores the chunk; the work runs in batches of at least
    BATCH samples, or once ``max_latency_s`` has passed since the last batch,
    or when a read-out (``modes``, ``crossings``, ``estimate()``) is asked for.
    Results never depend on where the batches fall; only when events come out.
    """

    def __init__(self, settings: dict | None = None, *, max_latency_s: float = 0.1):
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
        self.max_latency_s = max_latency_s
        wb = max(3, int(round(s["baseline_window"] / BLOCK)))
        self._wb = wb if wb % 2 else wb + 1        # odd number of blocks
        self._margin = self._wb                     # blocks of look-ahead the baseline needs
        self._alpha = min(1.0, GROUP / float(s["noise_window"]))
        self._f = float(s["merge_fraction"])
        self._lo = float(s["lo_sigma"])
        self._hi = float(s["hi_sigma"])
        self._conf = float(s["confirm_sigma"])
        self._minh = float(s["min_height"])
        self._last_proc = time.monotonic()
        # --- sample stage ---
        self._xb = SampleBuffer(np.float64)  # samples from absolute index _t0
        self._pb = SampleBuffer(np.float64)
        self._db = SampleBuffer(np.int8)
        self._t0 = 0
        self._n = 0                  # samples received
        self._done = 0               # samples through the detector
        self._last_dir = 0           # direction of the last sample through the detector
        self._last_in = 0            # direction of the last sample received
        self._bmb = SampleBuffer(np.float64)  # block means from block _bm0
        self._bm0 = 0
        self._nb = 0                 # complete (or final partial) blocks computed
        self._bbb = SampleBuffer(np.float64)  # baseline per block from block _bb0 up to _done // BLOCK
        self._bb0 = 0
        self._sigma: float | None = None
        self._floor = 0.0
        # running averages of the excursions below the baseline and their count, the
        # current group's sums, the largest block excess (fields kern.NZ_*)
        self._noise = np.zeros(8)
        self._open = -1              # start of the run above lo still open at _done
        self._open_trig = False
        self._revs: list[int] = []   # recent reversal indices (to cut candidates at turns)
        self._finished = False
        self._final_scan = False
        self._ev_done = 0            # samples through the event stage
        self._pend: list[tuple] = []      # candidate runs (starts, ends, confirm levels) not yet counted
        self._npend = 0
        self._pend_revs: list[tuple] = []  # reversals not yet counted
        # --- event stage ---
        es = float(s["expected_spacing_steps"])
        self._S: float | None = es if es > 0 else None
        self._phase = "run" if self._S else "init"
        self._held: list[list] = []  # ["c", columns] / ["r", (index, pos, dir)] / ["g", 0]
        self._lastrev: tuple | None = None   # (index, position, new direction)
        self._init_checked = 0       # candidate count the first spacing was last tried at
        self._P: dict | None = None  # the crossing still open to merging
        self._L: dict | None = None  # the last non-weak crossing
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
        # crossings of the current and the previous run: [[ks], [centres], [heights], dir, [reliable]]
        self._run_cur: list[list] = []
        self._run_prev: list[list] = []
        self._prev_arrays: tuple | None = None   # _run_arrays(_run_prev), once made
        self._cur_arrays: tuple | None = None
        self._n_cross = 0
        self._table = ModeTable()
        self._records: list[tuple] = []
        self._out: list[Event] = []
        self._est_cache: tuple | None = None

    # ------------------------------------------------------------------ input
    def feed(self, position_steps, direction, value) -> list[Event]:
        """Take one chunk of samples; return the events confirmed so far (in order)."""
        if self._finished:
            raise RuntimeError("StreamCounter.feed() after finish()")
        p, d, x = position_steps, direction, value
        # the usual input (1-d arrays of the types stored) goes through untouched
        if not (type(p) is np.ndarray and p.ndim == 1 and p.dtype.kind in "iuf"):
            p = np.asarray(p).ravel()
            if p.dtype.kind not in "iuf":    # integer or float positions are stored as they come
                p = p.astype(np.float64)
        if not (type(x) is np.ndarray and x.dtype is _F8 and x.ndim == 1 and x.flags.c_contiguous):
            x = np.asarray(x, dtype=np.float64).ravel()
        if not (type(d) is np.ndarray and d.ndim == 1 and d.dtype in _CHECKED_DIRECTIONS
                and d.flags.c_contiguous):
            d = np.asarray(d).ravel()
            if d.dtype not in _CHECKED_DIRECTIONS:
                d = d.astype(np.float64)     # the compiled check is built for these only
        if not (p.size == x.size == d.size):
            raise ValueError(f"feed: position, direction and value differ in length "
                             f"({p.size}, {d.size}, {x.size})")
        if p.size == 0:
            return self._take()
        n = x.size
        ok = kern.check_chunk(d, x)
        if ok < 0:
            raise ValueError("feed: value contains NaN or infinity")
        if ok == 0:                      # directions other than +1 / -1
            d = self._directions(d)
        xb, pb, db = self._xb, self._pb, self._db     # stored in place while there is room
        hi = xb.hi
        if hi + n <= min(xb.arr.size, pb.arr.size, db.arr.size) and pb.hi == hi == db.hi:
            xb.arr[hi:hi + n] = x
            pb.arr[hi:hi + n] = p
            db.arr[hi:hi + n] = d
            xb.hi = pb.hi = db.hi = hi + n
        else:
            xb.extend(x)
            pb.extend(p)
            db.extend(d)
        self._n += n
        self._last_in = int(db.arr[db.hi - 1])
        now = time.monotonic()
        if now - self._last_proc >= self.max_latency_s:
            self._process(final=False, events=True)
            self._last_proc = now
        elif self._n - self._done >= BATCH + (self._margin + 2) * BLOCK:
            self._process(final=False)
        return self._take()

    def _directions(self, d: np.ndarray) -> np.ndarray:
        """Directions as +1 / -1: the sign of each; 0 (no move) keeps the last direction."""
        d = np.sign(d).astype(np.int8)
        if not d.all():
            idx = np.where(d != 0, np.arange(d.size), -1)
            np.maximum.accumulate(idx, out=idx)
            d = np.where(idx >= 0, d[np.maximum(idx, 0)], self._last_in or 1).astype(np.int8)
        return d

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

    def _flush(self) -> None:
        """Bring the event stage up to date (read-outs call this)."""
        if not self._finished:
            self._process(final=False, events=True)
            self._last_proc = time.monotonic()

    # ------------------------------------------------------------ sample stage
    def _process(self, final: bool, events: bool = False) -> None:
        """Work through the stored samples in passes of at most BATCH samples.

        Candidates wait until EVENT_MIN of them are pending (the counter's
        fixed costs then spread over many); ``events`` runs them now.
        """
        while True:
            n_to = min(self._n, self._done + BATCH + (self._margin + 2) * BLOCK)
            last = n_to >= self._n
            before = self._done
            self._process_to(n_to, final and last)
            if last or self._done == before:
                break
        if events and (self._pend or self._pend_revs or self._ev_done < self._done):
            self._run_events()

    def _process_to(self, n: int, final: bool) -> None:
        """Detect and count over samples up to n (all of them if final)."""
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
            means = np.empty(-(-(xs.size - 2) // BLOCK))
            kern.despiked_block_means(xs, means)
            self._bmb.extend(means)
            self._nb = nb_target
        if final:
            fb, F = self._nb, n
            self._final_scan = True
        else:
            fb = self._nb - self._margin
            F = fb * BLOCK
        if F <= self._done:
            return
        if self._sigma is None:
            g_end = min(INIT_NOISE, n)
            if F < g_end:
                return
            self._init_noise(g_end)
        b0 = self._done // BLOCK
        self._bbb.extend(self._baseline_blocks(b0, fb))
        spans = self._scan(self._done, F, final)
        if spans is not None:
            self._pend.append(spans)
            self._npend += spans[0].size
        self._pend_revs.extend(self._reversals(self._done, F))
        self._done = F
        if final or self._npend >= EVENT_MIN:
            self._run_events()
        self._trim()

    def _run_events(self) -> None:
        """Measure the pending candidates and run the counter over them, up to _done."""
        spans = None
        if self._pend:
            spans = tuple(np.concatenate(v) for v in zip(*self._pend))
        revs, self._pend, self._npend, self._pend_revs = self._pend_revs, [], 0, []
        horizon = self._done
        if 0 <= self._open < horizon:
            # A run still open at the batch's end is a candidate that will end later and
            # be cut at any reversal inside it: the event stage stops at its start, and the
            # reversals (and spacing updates) after it wait, so that its piece before a
            # turn is counted before the turn, wherever the batch ended.
            horizon = self._open
            held = [r for r in revs if r[0] > horizon]
            if held:
                revs, self._pend_revs = revs[:len(revs) - len(held)], held
        self._events(spans, revs, horizon)

    def _init_noise(self, g_end: int) -> None:
        """Noise of the first group from the first group itself (look-ahead at start only)."""
        nbl = -(-g_end // BLOCK)
        base = self._baseline_blocks(0, nbl)
        x = self._x[:g_end]
        r = x - np.repeat(base, BLOCK)[:g_end]
        neg = np.minimum(r[::NOISE_STRIDE], 0.0)
        cnt = float(np.count_nonzero(neg))
        sig = KAPPA * (-neg.sum() / cnt) if cnt else 0.0
        for _ in range(2):                    # the same clipping as later groups get
            sig = KAPPA * (-np.maximum(neg, -NOISE_CLIP * sig).sum() / cnt) if cnt else 0.0
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
        o = np.empty(arr.size)
        kern.grey_opening(np.ascontiguousarray(arr), self._wb, o)
        return o[b0 - lo:b1 - lo]

    def _reversals(self, a: int, b: int) -> list[tuple]:
        d = self._d[a - self._t0:b - self._t0]
        if d.size == 0:
            return []
        prev = self._last_dir
        self._last_dir = int(d[-1])
        if d.min() == d.max() and (not prev or d[0] == prev):
            return []
        out = [a] if prev and d[0] != prev else []
        out.extend((a + 1 + np.flatnonzero(d[1:] != d[:-1])).tolist())
        p = self._p
        res = [(i, float(p[i - self._t0]), int(d[i - a])) for i in out]
        self._revs.extend(out)
        return res

    def _scan(self, a: int, F: int, final: bool):
        """Hysteresis over samples [a, F); returns completed candidate runs (start, end, confirm).

        Also folds the batch's noise into the noise level, group by group
        (signal_kernels.scan_batch).
        """
        t0 = self._t0
        n = F - a
        x = self._x[a - t0:F - t0]
        ba = a // BLOCK
        nbk = -(-n // BLOCK)
        bl = self._bb[ba - self._bb0:ba + nbk - self._bb0]
        means = self._bm[ba - self._bm0:ba + nbk - self._bm0]
        sig_at = np.empty(nbk)              # the noise level in force per block
        most = n // 2 + 2                   # runs alternate with gaps at the most
        st, en, eb = (np.empty(most, np.int64) for _ in range(3))
        self._noise[kern.NZ_SIGMA] = self._sigma
        k, self._open, trig = kern.scan_batch(
            x, a, means, bl, self._lo, self._hi, self._minh, NOISE_CLIP, GROUP // BLOCK,
            self._alpha, KAPPA, self._floor, final, self._noise, self._open, self._open_trig,
            st, en, eb, sig_at)
        self._sigma = float(self._noise[kern.NZ_SIGMA])
        self._open_trig = bool(trig)
        self._open = int(self._open)
        if k == 0:
            return None
        # confirm against the noise in force where the run ended
        return st[:k], en[:k], self._conf * sig_at[eb[:k]]

    def _split(self, st, en, conf):
        """Cut candidate runs at every reversal inside them: each piece lies in one run.

        A blip in progress at a turn (often its tail lasting into the backlash
        dead band) becomes a crossing of the old run and one of the new run.
        """
        revs = np.asarray(self._revs, np.int64)
        i0 = np.searchsorted(revs, st, side="right")
        i1 = np.searchsorted(revs, en - 1, side="right")
        nocut = np.zeros(st.size, bool)
        if not (i1 > i0).any():
            return st, en, conf, nocut, nocut
        cut = np.flatnonzero(i1 > i0)
        s2, e2, c2, cl, cr = [], [], [], [], []
        for i in cut.tolist():                  # only the runs that straddle a turn
            cuts = [int(st[i])] + revs[i0[i]:i1[i]].tolist() + [int(en[i])]
            for j in range(len(cuts) - 1):
                s2.append(cuts[j])
                e2.append(cuts[j + 1])
                c2.append(float(conf[i]))
                cl.append(j > 0)
                cr.append(j < len(cuts) - 2)
        keep = np.ones(st.size, bool)
        keep[cut] = False
        S = np.concatenate((st[keep], np.array(s2, np.int64)))
        order = np.argsort(S, kind="stable")
        return (S[order], np.concatenate((en[keep], np.array(e2, np.int64)))[order],
                np.concatenate((conf[keep], np.array(c2)))[order],
                np.concatenate((nocut[keep], np.array(cl, bool)))[order],
                np.concatenate((nocut[keep], np.array(cr, bool)))[order])

    def _measure(self, st, en, cut_l, cut_r, conf=None) -> dict[str, np.ndarray]:
        """Centre, area, height, extent and direction of candidate runs (signal_kernels.measure_runs).

        With ``conf`` (the confirm level of each run), runs longer than 0.6
        spacing that hold two blips are cut at the valley between them, and
        the pieces are measured instead.
        """
        t0, final = self._t0, self._final_scan
        st = np.ascontiguousarray(st, np.int64)
        en = np.ascontiguousarray(en, np.int64)
        if conf is None:
            long_, need = np.zeros(st.size, np.bool_), np.zeros(st.size)
        else:
            long_ = (np.abs(self._p[en - 1 - t0] - self._p[st - t0]) > 0.6 * self._S
                     if self._S else np.ones(st.size, np.bool_))
            need = conf * (self._hi / self._conf)
        cut_l0, cut_r0 = cut_l, cut_r
        cut_l = cut_l | (st == 0)
        cut_r = (cut_r | (en >= self._n)) if final else cut_r
        out_f, out_i = np.empty((st.size, 7)), np.empty((st.size, 2), np.int64)
        cuts = np.empty(int((en - st)[long_].sum()) // 2 + 1, np.int64)
        k = kern.measure_runs(self._x, self._p, self._bb, t0, self._bb0, final, st, en,
                              np.ascontiguousarray(cut_l, np.bool_), np.ascontiguousarray(cut_r, np.bool_),
                              long_, need, out_f, out_i, cuts)
        if k:
            s2 = np.unique(np.concatenate((st, cuts[:k])))           # piece starts
            owner = np.searchsorted(st, s2, side="right") - 1
            same = np.append(owner[1:] == owner[:-1], False)
            e2 = np.where(same, np.append(s2[1:], 0), en[owner])
            out = self._measure(s2, e2, cut_l0[owner] & (s2 == st[owner]), cut_r0[owner] & ~same)
            out["_conf"] = conf[owner]
            return out
        return {"start": st, "end": en, "peak": out_i[:, 0].copy(), "pos": out_f[:, 0].copy(),
                "area": out_f[:, 1].copy(), "height": out_f[:, 2].copy(), "hmed": out_f[:, 3].copy(),
                "d": self._d[st - t0].astype(np.int64), "partial": out_i[:, 1].astype(bool),
                "pmin": out_f[:, 4].copy(), "pmax": out_f[:, 5].copy(), "step": out_f[:, 6].copy()}

    # ------------------------------------------------------------- event stage
    def _events(self, spans, revs: list[tuple], F: int) -> None:
        """Run the up/down counter over the new candidates and reversals, in time order."""
        runs = self._split(*spans) if spans is not None else None
        # cut points: reversals (after candidates ending at or before them) and the
        # ends of event groups (spacing updates), in time order
        cuts = [(r[0], 1, "r", r) for r in revs]
        g0 = self._ev_done // EVENT_GROUP + 1
        cuts.extend((g * EVENT_GROUP, 2, "g", 0) for g in range(g0, F // EVENT_GROUP + 1))
        self._ev_done = F
        cuts.sort(key=lambda t: (t[0], t[1]))
        i = 0
        measured = None
        ends = runs[1] if runs is not None else None
        if runs is not None:             # all at once; again later only where the spacing says
            measured = (self._measured(runs, 0, ends.size), None)
        for t, prio, kind, obj in cuts:
            if runs is not None:
                j = int(np.searchsorted(ends, t, side="right"))
                if j > i:
                    measured = self._dispatch_runs(runs, i, j, measured)
                    i = j
            self._dispatch(kind, obj)
        if runs is not None and i < ends.size:
            self._dispatch_runs(runs, i, ends.size, measured)
        if self._phase != "run":
            self._release(final=False)

    def _long(self, st: np.ndarray, en: np.ndarray, S: float | None) -> np.ndarray:
        """Runs spanning more than 0.6 spacing (all, the spacing unknown): the valley test's."""
        if not S:
            return np.ones(st.size, np.bool_)
        t0 = self._t0
        return np.abs(self._p[en - 1 - t0] - self._p[st - t0]) > 0.6 * S

    def _measured(self, runs, i: int, k: int):
        """(i, k, candidate columns, spacing) of runs i..k-1 measured with the spacing now."""
        st, en, conf, cl, cr = runs
        c = self._measure(st[i:k], en[i:k], cl[i:k], cr[i:k], conf[i:k])
        # single-sample spikes fail here: their 3-point median stays in the noise
        keep = c["hmed"] > c.pop("_conf", conf[i:k])
        return (i, k, {f: c[f][keep] for f in _CFIELDS}, self._S)

    def _dispatch_runs(self, runs, i: int, j: int, measured):
        """Dispatch the candidates of runs i..j-1, as measured with the spacing in force at
        their turn (it changes at group ends and once at the start), so that where the
        batches ended changes nothing: when the spacing changed since they were measured,
        and with it which runs get the valley test, their event group is measured again.
        ``measured``: (all runs, that group) as _measured gives them; returns it updated."""
        st, en = runs[0], runs[1]
        full, group = measured
        base = group if group is not None and group[0] <= i and j <= group[1] else full
        S = self._S
        if S != base[3]:
            flips = self._long(st[i:], en[i:], base[3]) != self._long(st[i:], en[i:], S)
            if not flips.any() and base is full:
                full = base = full[:3] + (S,)     # as measured with S: no need to look again
            elif flips[:j - i].any():
                g = -(-int(en[i]) // EVENT_GROUP) * EVENT_GROUP      # the group end this run is counted by
                base = group = self._measured(runs, i, max(j, int(np.searchsorted(en, g, side="right"))))
        c = base[2]
        a = int(np.searchsorted(c["start"], st[i], side="left"))
        b = int(np.searchsorted(c["start"], en[j - 1] - 1, side="right"))
        if b > a:
            self._dispatch_cands({f: v[a:b] for f, v in c.items()})
        return full, group

    # ---- dispatch (holding while the spacing or the first backlash is unknown)
    def _dispatch_cands(self, c: dict) -> None:
        if self._phase != "run":
            self._held.append(["c", c])
            self._release(final=False)
            return
        self._run_cands(c)

    def _dispatch(self, kind: str, obj) -> None:
        if self._phase != "run":
            self._held.append([kind, obj])
            self._release(final=False)
        elif kind == "r":
            self._on_reversal(obj)
        else:
            self._end_group_spacing()

    def _release(self, final: bool) -> None:
        """Decide held items once enough are in, then replay them in order.

        Holding is decided by the data alone (candidate counts, travel), and
        the held items (candidates, reversals, group ends) replay in stream
        order, so when a release happens never changes what it yields.
        """
        if self._phase == "init":
            # the first spacing is decided at fixed candidate counts (12, 24, 48...)
            # from exactly that many candidates, whatever the batching
            pos, area, h, w, run = [], [], [], [], []
            r = 0
            for kind, obj in self._held:
                if kind == "c":
                    pos.append(obj["pos"])
                    area.append(obj["area"])
                    h.append(obj["height"])
                    w.append(obj["pmax"] - obj["pmin"] + obj["step"])
                    run.append(np.full(obj["pos"].size, r))
                elif kind == "r":
                    r += 1
            if not pos:
                if not final:
                    return
                pos = area = h = w = run = [np.zeros(0)]
            pos, area, h, w = (np.concatenate(v) for v in (pos, area, h, w))
            run = np.concatenate(run).astype(np.int64)
            counts = [cp for cp in INIT_COUNTS if cp <= pos.size]
            if final and (not counts or counts[-1] != pos.size):
                counts.append(pos.size)
            chosen = None
            for cp in counts:
                if cp <= self._init_checked and cp != pos.size:
                    continue
                self._init_checked = cp
                rr = run[:cp]
                runs = [pos[:cp][rr == j] for j in range(int(rr.max()) + 1)] if cp else []
                if not final and max((x.size for x in runs), default=0) < N_INIT:
                    continue
                ares = [area[:cp][rr == j] for j in range(int(rr.max()) + 1)] if cp else []
                S, periods = initial_spacing(runs, ares) if cp else (None, 0.0)
                if (S is not None and periods >= 4) or cp >= INIT_COUNTS[-1] or (final and cp == pos.size):
                    # enough, or as good as it gets
                    chosen = (cp, S)
                    break
            if chosen is None:
                return
            cp, self._S = chosen
            if cp:
                self._wtyp, self._htyp = float(np.median(w[:cp])), float(np.median(h[:cp]))
        elif self._phase == "align":
            has_rev = any(kind == "r" for kind, _ in self._held)
            idx, rpos, newdir = self._lastrev
            latest = float(self._p[self._done - 1 - self._t0])
            travel = newdir * (latest - rpos)
            if not final and not has_rev and travel < FIT_TRAVEL * self._S:
                return
            self._b = self._fit_backlash()
        else:
            return
        held, self._held = self._held, []
        self._phase = "run"
        for i, (kind, obj) in enumerate(held):
            if self._phase != "run":          # a replayed reversal started holding again
                self._held.extend(held[i:])
                break
            if kind == "c":
                self._run_cands(obj)
            else:
                self._dispatch(kind, obj)
        if self._held:
            self._release(final)

    # ---- the up/down counter
    def _first_after_reversal(self, pos: float, d: int) -> tuple[int, bool]:
        """Mode index of the first (non-weak) crossing of a fresh run, and off the lattice?"""
        L, S = self._L, self._S
        if L is None:
            return 0, False
        if S is None:
            return L["k"] + (d if d == L["side"] else 0), False
        if d == L["side"]:
            # same direction as the last crossing: positions compare directly
            xs = d * (pos - L["cent"]) / S
        elif self._b is not None:
            # back the other way: the last mode reappears shifted by the backlash
            xs = d * (pos - (L["cent"] - L["side"] * self._b)) / S
        else:
            return L["k"], False
        n = int(np.rint(xs))
        return L["k"] + d * n, abs(xs - n) > OFF_LATTICE

    def _glimpse_like(self, width: float, low: bool) -> bool:
        """Low, or clearly narrower than the typical blip: what a kick's brief look is."""
        return bool(low or (self._wtyp and width < GLIMPSE_WIDTH * self._wtyp))

    def _run_cands(self, c: dict) -> None:
        n = c["pos"].size
        i = 0
        while i < n:
            P = self._P
            if P is None or P["fresh"] or not self._S or int(c["d"][i]) != P["d"]:
                self._one(c, i)
                i += 1
            else:
                i = self._run_block(c, i)

    def _run_block(self, c: dict, i0: int) -> int:
        """_one over candidates i0, i0+1, ... in compiled code, while the run goes on.

        Returns the first candidate it left for _one (a change of direction).
        """
        P = self._P
        Pf = np.array([np.nan if P[f] is None else P[f] for f in ck.PF_FIELDS], np.float64)
        Pi = np.array([0 if P[f] is None else int(P[f]) for f in ck.PI_FIELDS], np.int64)
        m = c["pos"].size - i0
        # column-major, so each column handed to _emit is contiguous already
        out_i, out_f = np.empty((m, 6), np.int64, order="F"), np.empty((m, 4), order="F")
        gap_v, gap_n = np.empty(m), np.empty(m, np.int64)
        i, n_out, n_gap = ck.merge_and_number(
            c["pos"], c["area"], c["height"], c["peak"], c["start"], c["end"], c["partial"],
            c["pmin"], c["pmax"], c["step"], c["d"], i0, Pf, Pi, float(self._S), self._f,
            float(self._htyp or 0.0), float(self._wtyp or 0.0), MAX_SPAN, MAIN_HEIGHT,
            OFF_LATTICE, WEAK_WIDTH, GLIMPSE_WIDTH, out_i, out_f, gap_v, gap_n)
        self._push_gaps(gap_v[:n_gap], gap_n[:n_gap])
        if n_out:
            oi, of = out_i[:n_out], out_f[:n_out]
            self._emit(oi[:, ck.OI_K], oi[:, ck.OI_PEAK], oi[:, ck.OI_START], oi[:, ck.OI_END],
                       of[:, ck.OF_CEN], int(P["d"]), of[:, ck.OF_H], of[:, ck.OF_WIDTH],
                       of[:, ck.OF_AREA], oi[:, ck.OI_PARTS], oi[:, ck.OI_WEAK].astype(bool))
        flags = ("hasmain", "fresh", "deadband", "repeat", "offlat")
        new = {f: float(v) for f, v in zip(ck.PF_FIELDS, Pf.tolist())}
        new.update((f, bool(v) if f in flags else int(v)) for f, v in zip(ck.PI_FIELDS, Pi.tolist()))
        if math.isnan(new["anc_cent"]):
            new["anc_cent"] = new["anc_k"] = None
        self._P = {f: new[f] for f in P if f != "cent"}
        return int(i)

    def _new_pending(self, c: dict, i: int, k: int, fresh: bool, anc_k, anc_cent, n: int) -> dict:
        h = float(c["height"][i])
        main = not self._htyp or h >= MAIN_HEIGHT * self._htyp
        pos = float(c["pos"][i])
        return {"k": int(k), "d": int(c["d"][i]), "ref": pos, "sw": float(c["area"][i]),
                "swp": 0.0, "last": pos, "h": h, "peak": int(c["peak"][i]),
                "hasmain": bool(main), "start": int(c["start"][i]), "end": int(c["end"][i]),
                "parts": 1, "npartial": int(bool(c["partial"][i])), "pmin": float(c["pmin"][i]),
                "pmax": float(c["pmax"][i]), "stepsum": float(c["step"][i]), "fresh": bool(fresh),
                "anc_k": anc_k, "anc_cent": anc_cent, "n": int(n), "deadband": False,
                "repeat": bool(not fresh and n == 0), "offlat": False}

    def _one(self, c: dict, i: int) -> None:
        """One candidate, in Python: at the start, right after a reversal or a change of
        direction. The reference for crossing_kernels.merge_and_number, which does the
        same for the rest of a run (a test checks the two give the same events).
        """
        P, S, d = self._P, self._S, int(c["d"][i])
        pos = float(c["pos"][i])
        if (P is not None and S and d == P["d"] and d * (pos - P["last"]) < self._f * S
                and d * (pos - P["ref"]) < MAX_SPAN * S):
            area, h = float(c["area"][i]), float(c["height"][i])
            P["hasmain"] = P["hasmain"] or (not self._htyp or h >= MAIN_HEIGHT * self._htyp)
            P["sw"] += area
            P["swp"] += area * (pos - P["ref"])
            P["last"] = pos
            if h > P["h"]:
                P["h"], P["peak"] = h, int(c["peak"][i])
            P["end"] = max(P["end"], int(c["end"][i]))
            P["parts"] += 1
            P["npartial"] += int(bool(c["partial"][i]))
            P["pmin"] = min(P["pmin"], float(c["pmin"][i]))
            P["pmax"] = max(P["pmax"], float(c["pmax"][i]))
            P["stepsum"] += float(c["step"][i])
            return
        was_fresh = P is not None and P["fresh"]
        weak = self._finalise_pending() if P is not None else None
        if P is None or (was_fresh and weak) or d != P["d"]:
            k, offl = self._first_after_reversal(pos, d)
            self._P = self._new_pending(c, i, k, True, None, None, 0)
            self._P["offlat"] = offl
            if self._b is not None and self._lastrev is not None and S:
                # still inside the dead band after the turn: the mount has not
                # moved yet, this is the old blip's tail, not a crossing
                if d * (pos - self._lastrev[1]) < self._b - 0.1 * S:
                    self._P["deadband"] = True
                    if self._L is not None:
                        self._P["k"] = self._L["k"]
            return
        # same run, same direction: number from the anchor (the last non-weak crossing)
        anc_k, anc_cent = (P["anc_k"], P["anc_cent"]) if weak else (P["k"], P["cent"])
        if anc_cent is None:
            anc_k, anc_cent = P["k"], P["cent"]
        xs = d * (pos - anc_cent) / S if S else 1.0
        n = max(0, int(np.rint(xs))) if S else 1
        self._P = self._new_pending(c, i, anc_k + d * n, False, anc_k, anc_cent, n)
        self._P["offlat"] = bool(S) and abs(xs - n) > OFF_LATTICE

    def _push_gaps(self, gaps, ns) -> None:
        if len(gaps):
            self._gaps.extend(np.asarray(gaps, float).tolist())
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
        weak = (P["npartial"] >= P["parts"] or P["deadband"] or P["repeat"]
                or (P["offlat"] and self._glimpse_like(width, not P["hasmain"]))
                or (bool(self._wtyp) and width < WEAK_WIDTH * self._wtyp))
        if not weak and P["anc_cent"] is not None and not P["fresh"] and P["n"] >= 1:
            self._push_gaps([P["d"] * (cen - P["anc_cent"]) / P["n"]], [P["n"]])
        self._emit1(P["k"], P["peak"], P["start"], P["end"], cen, P["d"], P["h"], width,
                    P["sw"], P["parts"], weak)
        return weak

    def _emit1(self, k, peak, start, end, cen, d, h, w, area, parts, weak) -> None:
        """One crossing out (the scalar twin of _emit)."""
        self._out.append(Event("blip", int(peak), float(cen), int(d), int(k), float(h), float(w)))
        self._table.add1(k, d, cen, h, w, not weak)
        self._records.append((k, peak, start, end, cen, d, h, w, area, parts, bool(weak), self._run))
        self._n_cross += 1
        self._run_cur.append([[k], [cen], [h], int(d), [not weak]])
        if not weak:
            self._L = {"k": int(k), "cent": float(cen), "side": int(d), "h": float(h)}
            self._wrec.append(float(w))
            self._hrec.append(float(h))
        elif self._L is None:
            self._L = {"k": int(k), "cent": float(cen), "side": int(d), "h": float(h)}
        self._est_cache = None

    def _emit(self, ks, peaks, starts, ends, cens, d, hs, ws, areas, parts, weak) -> None:
        """Crossings of one run out, in order (what _emit1 does for each)."""
        ks, peaks, starts, ends, cens, hs, ws, areas, parts = (
            np.ascontiguousarray(v) for v in (ks, peaks, starts, ends, cens, hs, ws, areas, parts))
        n = len(ks)
        kl = ks.tolist()
        cl = cens.tolist()
        hl = hs.tolist()
        wl = ws.tolist()
        # tuple.__new__ straight, as Event._make does without its length check (half the cost)
        self._out.extend(map(_new_tuple, repeat(Event, n),
                             zip(repeat("blip", n), peaks.tolist(), cl, repeat(int(d), n), kl, hl, wl)))
        strong = ~weak
        dd = np.full(n, d)
        self._table.add(ks, dd, cens, hs, ws, strong)
        self._records.append((ks, peaks, starts, ends, cens, dd, hs, ws, areas, parts,
                              weak.copy(), np.full(n, self._run)))
        self._n_cross += n
        self._run_cur.append([kl, cl, hl, int(d), strong.tolist()])
        si = np.flatnonzero(strong)
        if si.size:
            i = int(si[-1])
            self._L = {"k": kl[i], "cent": cl[i], "side": int(d), "h": hl[i]}
            self._wrec.extend(ws[si[-GAP_MEMORY:]].tolist())
            self._hrec.extend(hs[si[-GAP_MEMORY:]].tolist())
        elif self._L is None:          # as _emit1 one at a time: the first weak one
            self._L = {"k": kl[0], "cent": cl[0], "side": int(d), "h": hl[0]}
        self._est_cache = None

    def _on_reversal(self, rev: tuple) -> None:
        idx, pos, newdir = rev
        self._finalise_pending()
        kl = self._L["k"] if self._L else 0
        self._out.append(Event("reversal", int(idx), float(pos), int(newdir), int(kl), 0.0, 0.0))
        self._cur_arrays = None
        pairs = self._pairs(self._run_cur, self._run_prev)
        if pairs.size:
            self._bpairs.extend(pairs.tolist())
            del self._bpairs[:-64]
            self._b = _median(pairs.tolist()) if pairs.size >= 3 else _median(self._bpairs)
        if self._run_cur:
            self._run_prev = self._run_cur
            self._prev_arrays = self._cur_arrays     # None: made when first needed
        self._run_cur = []
        self._run += 1
        self._lastrev = (int(idx), float(pos), int(newdir))
        if self._b is None and self._L is not None and self._S:
            self._phase = "align"

    @staticmethod
    def _run_arrays(run: list):
        """(k, centre, direction) of a run's trusted crossings, as arrays."""
        # flattened in Python first: most entries hold a single crossing
        k, c, d, rel = [], [], [], []
        for r in run:
            k += r[0]
            c += r[1]
            d += [r[3]] * len(r[0])
            rel += r[4]
        rel = np.array(rel, bool)
        return (np.array(k, np.int64)[rel], np.array(c, float)[rel],
                np.array(d, np.int64)[rel])

    def _pairs(self, cur: list, prev: list) -> np.ndarray:
        """Backlash estimates d * (centre in this run - centre in the previous run), per mode."""
        if not cur or not prev:
            return np.zeros(0)
        kc, cc, dc = self._run_arrays(cur)
        # the previous run's arrays were made when it was the current one
        if self._prev_arrays is None:
            self._prev_arrays = self._run_arrays(prev)
        kp, cp, dp = self._prev_arrays
        self._cur_arrays = (kc, cc, dc)
        out = np.empty(kc.size)
        return out[:ck.backlash_pairs(kc, cc, dc, kp, cp, dp, out)]

    def _fit_backlash(self) -> float | None:
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
        order = np.argsort(op, kind="stable")
        op, ov = op[order], ov[order]
        bmax = min(float(travel.max()) - 0.5 * S, 3.0 * S)
        if bmax <= 0:
            return None
        grid = np.arange(0.0, bmax, max(S / 60.0, 0.1))
        if np_.size > 4000:                   # many reads per step: thin them evenly
            keep = np.linspace(0, np_.size - 1, 4000).astype(np.int64)
            np_, nv = np_[keep], nv[keep]
        # misfit per trial backlash, a few rows at a time: the same numbers as one big
        # array (each row is reduced on its own), without megabytes of fresh temporaries
        J = np.empty(grid.size)
        for r0 in range(0, grid.size, 16):
            g = grid[r0:r0 + 16]
            q = np_[None, :] + side * g[:, None]
            q = np.where(side * (q - rpos) > 0, rpos, q)
            res = nv[None, :] - np.interp(q, op, ov)
            res -= res.mean(axis=1, keepdims=True)
            J[r0:r0 + 16] = np.mean(res * res, axis=1)
        i = int(np.argmin(J))
        far = np.abs(grid - grid[i]) > 0.3 * S
        if not far.any() or J[far].min() < 1.5 * J[i]:
            return None
        return float(grid[i])

    def _end_group_spacing(self) -> None:
        """At an event-group end: running spacing and typical width/height."""
        if self._wrec:
            del self._wrec[:-GAP_MEMORY]
            del self._hrec[:-GAP_MEMORY]
            self._wtyp = _median(self._wrec)
            self._htyp = _median(self._hrec)
        if not self._gaps_new or not self._gaps:
            return
        self._gaps_new = False
        if len(self._ns) >= 8 and _median(self._ns) >= 2:
            # every step spans several spacings: the spacing estimate is a fraction too small
            self._S = _median([g * n for g, n in zip(self._gaps, self._ns)])
            self._gaps, self._ns = [self._S], [1]
            return
        self._S = _median(self._gaps)

    def _fit_from(self) -> int:
        """Until the backlash is known: the first sample its fit may need, the start of
        the run before the reversal it will be fitted at (the one waiting in the event
        stage, or the next to come; the sample stage may have seen short turns after it)."""
        last = self._lastrev[0] if self._lastrev is not None else -1
        if self._phase == "align":
            at = last
        else:
            at = next((r for r in self._revs if r > last), None)
        if at is None:
            return self._revs[-1] if self._revs else 0
        before = [r for r in self._revs if r < at]
        return before[-1] if before else 0

    def _trim(self) -> None:
        keep_from = self._done - 2
        if self._open >= 0:
            keep_from = min(keep_from, self._open - 2)
        if self._pend:
            keep_from = min(keep_from, int(self._pend[0][0][0]) - 2)
        if self._b is None:
            keep_from = min(keep_from, max(self._fit_from(), self._done - MAX_RUN_SAMPLES))
        keep_from = max(keep_from, self._t0)
        cut = keep_from - self._t0
        if cut > 4 * GROUP:
            self._xb.drop(cut)
            self._pb.drop(cut)
            self._db.drop(cut)
            self._t0 = keep_from
        room = BATCH + (self._margin + 2) * BLOCK + CHUNK_ROOM
        self._xb.make_room(room)
        self._pb.make_room(room)
        self._db.make_room(room)
        bkeep = max(self._bm0, min(self._t0 // BLOCK, self._done // BLOCK - self._margin - 2))
        if bkeep - self._bm0 > 4 * GROUP // BLOCK:
            self._bmb.drop(bkeep - self._bm0)
            self._bm0 = bkeep
        bbkeep = max(self._bb0, self._t0 // BLOCK)
        if bbkeep - self._bb0 > 4 * GROUP // BLOCK:
            self._bbb.drop(bbkeep - self._bb0)
            self._bb0 = bbkeep
        if len(self._revs) > 64:
            first = int(self._pend[0][0][0]) if self._pend else self._done
            keep = [r for r in self._revs[:-64] if r >= first - 1]
            self._revs = keep + self._revs[-64:]

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
        """Distinct modes crossed so far, by trusted crossings (the open one included).

        A weak crossing alone (a glimpse during a kick, the cut-off flank at
        a sweep end or a turn, a blip below a quarter of the typical height)
        does not make a mode.
        """
        self._flush()
        seen = set(np.flatnonzero(self._table.strong > 0) + self._table.off)
        P = self._P
        if P is not None and P["hasmain"] and not (P["deadband"] or P["repeat"]):
            seen.add(P["k"])
        return len(seen)

    @property
    def crossings(self) -> int:
        """Every crossing counted, all passes (a split blip or a kick's repeat is one)."""
        self._flush()
        return self._n_cross + (1 if self._P is not None else 0)

    @property
    def spacing_steps(self) -> float | None:
        """The running spacing the counter works with (None until learnt)."""
        return self._S

    @property
    def noise_sigma(self) -> float | None:
        """The noise level (standard deviation of one sample) the thresholds are set from."""
        return self._sigma

    def mode_centres(self) -> dict[str, np.ndarray]:
        """Per-mode means: k, centre up / down (NaN if never crossed that way), counts, height, width."""
        self._flush()
        t = self._table
        k = np.arange(t.seen.size) + t.off
        with np.errstate(invalid="ignore", divide="ignore"):
            up = t.sum[0] / t.cnt[0]
            dn = t.sum[1] / t.cnt[1]
            h = t.hsum / t.seen
            w = t.wsum / t.seen
        sel = t.strong > 0
        return {"mode": k[sel], "centre_up": up[sel], "centre_down": dn[sel],
                "n_up": t.cnt[0][sel], "n_down": t.cnt[1][sel], "crossings": t.seen[sel],
                "height": h[sel], "width_steps": w[sel]}

    def estimate(self) -> dict:
        """modes, crossings, spacing_steps (+ _u) at centre_steps, and backlash_steps from the mode table.

        Cheap (one small least-squares fit over the modes, cached until the
        next crossing), so a dashboard can call it several times a second.
        """
        self._flush()
        key = (self._n_cross, None if self._P is None else self._P["k"])
        if self._est_cache is not None and self._est_cache[0] == key:
            return dict(self._est_cache[1], warming_up=self.warming_up())
        mc = self.mode_centres()
        backlash, mech = mechanical_centres(mc)
        ok = np.isfinite(mech)
        sp, su, fit = fit_spacing(mc["mode"][ok], mech[ok], mc["n_up"][ok] + mc["n_down"][ok])
        if sp is None and self._S:
            sp = self._S
        # the spacing in steps changes across a sweep (Littrow tuning, dispersion): it is
        # the fit's at centre_steps, the middle of the modes seen so far
        out = {"modes": self.modes, "crossings": self.crossings,
               "spacing_steps": sp, "spacing_steps_u": su, "backlash_steps": backlash,
               "centre_steps": fit.get("centre_steps")}
        self._est_cache = (key, out)
        return dict(out, warming_up=self.warming_up())

    def warming_up(self) -> str | None:
        """What the count waits for, in a few words (None once counting):
        the count stays 0 until the noise level and then the spacing are known, and
        holds still after the first turn until the backlash is fitted."""
        if self._finished:
            return None
        if self._sigma is None:
            return f"noise level, {min(self._n, INIT_NOISE)}/{INIT_NOISE} samples"
        if self._phase == "init":
            held = sum(obj["pos"].size for kind, obj in self._held if kind == "c")
            return f"spacing, {held} blips held"
        if self._phase == "align":
            return "backlash, fitted after the turn"
        return None

    def crossing_table(self) -> dict[str, np.ndarray]:
        """Every finalised crossing since this counter was made (or restored), as columns."""
        self._flush()
        cols: list[list] = [[] for _ in _RFIELDS]
        for rec in self._records:
            for col, v in zip(cols, rec):
                col.append(np.atleast_1d(v))
        kinds = (np.int64, np.int64, np.int64, np.int64, float, np.int64, float, float, float,
                 np.int64, bool, np.int64)
        return {f: (np.concatenate(col).astype(k) if col else np.zeros(0, k))
                for f, col, k in zip(_RFIELDS, cols, kinds)}

    # ---------------------------------------------------------------- state
    _STATE_ARRAYS = ("_x", "_p", "_d", "_bm", "_bb")
    _STATE_PLAIN = ("_t0", "_n", "_done", "_last_dir", "_last_in", "_bm0", "_nb", "_bb0",
                    "_sigma", "_floor", "_noise", "_open",
                    "_open_trig", "_revs", "_finished", "_final_scan", "_ev_done", "_pend", "_npend",
                    "_pend_revs", "_S", "_phase",
                    "_held", "_lastrev", "_init_checked",
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
        if "_noise" not in state:           # saved before the noise state was one array
            ema = state["_ema"] or [0.0, 0.0]
            gsum = float(sum(sum(v) for v in state["_gneg"]))
            state = dict(state, _noise=[state["_sigma"] or 0.0, ema[0], ema[1],
                                        float(state["_ema"] is not None), gsum, state["_gcnt"],
                                        state["_gmax"], state["_rmax"]])
        c = cls(state["settings"])
        c._xb = SampleBuffer(np.float64, state["_x"])
        c._pb = SampleBuffer(np.float64, state["_p"])
        c._db = SampleBuffer(np.int8, state["_d"])
        c._bmb = SampleBuffer(np.float64, state["_bm"])
        c._bbb = SampleBuffer(np.float64, state["_bb"])
        for name in cls._STATE_PLAIN:
            setattr(c, name, state[name])
        kinds = {"start": np.int64, "end": np.int64, "peak": np.int64, "d": np.int64,
                 "partial": bool}
        c._held = [[kind, {f: np.array(v, kinds.get(f, np.float64)) for f, v in obj.items()}
                    if kind == "c" else (tuple(obj) if kind == "r" else obj)]
                   for kind, obj in c._held]
        if c._lastrev is not None:
            c._lastrev = tuple(c._lastrev)
        c._noise = np.array(c._noise, np.float64)
        c._pend = [(np.array(s, np.int64), np.array(e, np.int64), np.array(f, np.float64))
                   for s, e, f in c._pend]
        c._pend_revs = [tuple(r) for r in c._pend_revs]
        c._table = ModeTable.from_state(state["_table"])
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
