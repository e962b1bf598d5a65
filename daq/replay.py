"""Replay a run log through the streaming counter, chunk by chunk as the live run fed it.

The engine writes one sample block per flush, so the log's blocks are the
live run's chunks: a paced replay feeds them block by block (blocks longer
than a live flush are split), the calls the counter got live. ``--fast``
feeds up to FAST_CHUNK_SAMPLES at a time: the counter's results do not depend
on how its input is cut (its tests check that), and fewer, larger calls cost
less. With the same settings the count is the same. Blocks are read and
decoded on a thread of their own, a bounded queue ahead, so memory stays
bounded for any log.
"""
from __future__ import annotations

import json
import queue
import threading
import time
import zlib
from dataclasses import dataclass
from typing import Callable, Iterator

import numpy as np

from daq.engine import FLUSH_SAMPLES, LiveState
from daq.runlog import LogError, RunLog, _unpack_delta, _unpack_float

STATE_EVERY_S = 0.1          # how often the dashboard's LiveState is refreshed
COMMIT_EVERY_S = 1.0         # how often a new log is committed (as the engine: at least once a second)
LISTED = 50                  # differences listed in full; the rest are counted
FAST_CHUNK_SAMPLES = 65536   # samples per counter call with --fast


@dataclass
class Chunk:
    first_i: int
    position_steps: np.ndarray
    direction: np.ndarray
    pass_index: np.ndarray
    value: np.ndarray
    t_s: np.ndarray | None = None
    spread: np.ndarray | None = None
    aux: dict | None = None

    def __len__(self) -> int:
        return int(self.value.size)


def iter_chunks(log: RunLog, with_time: bool = False, with_all: bool = False,
                max_samples: int = FLUSH_SAMPLES) -> Iterator[Chunk]:
    """The log's samples as live-sized chunks, decoding only the columns asked for.

    Reads the sample_blocks table of ``daq.runlog`` directly (with its codecs):
    ``RunLog.iter_blocks`` decodes every column, which halves the replay rate.
    """
    cols = "first_i, n, pos, dir, pass, value"
    if with_time or with_all:
        cols += ", t_us"
    if with_all:
        cols += ", spread, aux_json"
    cur = log.conn.execute(f"SELECT {cols} FROM sample_blocks ORDER BY block")
    for row in cur:
        first_i, n = row[0], row[1]
        try:
            # directions and passes as stored (int8, int16): the counter takes any integers
            c = Chunk(first_i, _unpack_delta(row[2]), np.frombuffer(zlib.decompress(row[3]), "<i1"),
                      np.frombuffer(zlib.decompress(row[4]), "<i2"), _unpack_float(row[5], n))
            if with_time or with_all:
                c.t_s = _unpack_delta(row[6]) / 1e6
            if with_all:
                c.spread = _unpack_float(row[7], n)
                c.aux = {k: np.asarray(v, dtype=np.float64) for k, v in json.loads(row[8]).items()} if row[8] else None
        except (zlib.error, ValueError, IndexError) as exc:
            raise LogError(f"log {log.path}: damaged sample block ({exc})") from None
        if n <= max_samples:
            yield c
            continue
        for k in range(0, n, max_samples):
            sl = slice(k, k + max_samples)
            yield Chunk(first_i + k, c.position_steps[sl], c.direction[sl], c.pass_index[sl], c.value[sl],
                        None if c.t_s is None else c.t_s[sl], None if c.spread is None else c.spread[sl],
                        None if c.aux is None else {a: v[sl] for a, v in c.aux.items()})


READ_AHEAD_SAMPLES = 1 << 20   # decoded samples the reader thread may hold ready (~20 MB)
_END = object()


def _joined(chunks: list[Chunk]) -> Chunk:
    """Consecutive chunks as one (positions, directions, passes, values only)."""
    if len(chunks) == 1:
        return chunks[0]
    return Chunk(chunks[0].first_i, *(np.concatenate([getattr(c, f) for c in chunks])
                                      for f in ("position_steps", "direction", "pass_index", "value")))


def iter_chunks_ahead(log: RunLog, with_time: bool = False, with_all: bool = False,
                      max_samples: int = FLUSH_SAMPLES) -> Iterator[Chunk]:
    """iter_chunks on a thread of its own, with its own read-only connection.

    SQLite and zlib release the GIL, so reading and decompressing the next
    blocks overlaps the counting (and the counter's start-up) on another
    core. At most READ_AHEAD_SAMPLES wait decoded, so memory stays bounded;
    errors (a damaged block) are raised here, in order, as iter_chunks would
    raise them. Without times and other columns, consecutive blocks are
    joined up to ``max_samples`` (a live log's blocks are a few thousand).
    """
    q: queue.Queue = queue.Queue()
    room = threading.Condition()
    held = [0]                            # decoded samples in the queue
    stop = threading.Event()
    join = not (with_time or with_all)

    def put(item, n: int) -> bool:
        with room:
            while held[0] + n > READ_AHEAD_SAMPLES and held[0] > 0 and not stop.is_set():
                room.wait(0.1)
            if stop.is_set():
                return False
            held[0] += n
        q.put((item, n))
        return True

    def read() -> None:
        try:
            own = RunLog.open(log.path)
            try:
                pend, n_pend = [], 0
                try:
                    for c in iter_chunks(own, with_time, with_all, max_samples):
                        if join and n_pend + len(c) > max_samples and pend:
                            if not put(_joined(pend), n_pend):
                                return
                            pend, n_pend = [], 0
                        pend.append(c)
                        n_pend += len(c)
                        if not join:
                            if not put(c, len(c)):
                                return
                            pend, n_pend = [], 0
                except BaseException:
                    if pend:                  # the good samples before a damaged block first
                        put(_joined(pend), n_pend)
                    raise
                if pend and not put(_joined(pend), n_pend):
                    return
            finally:
                own.close()
            put(_END, 0)
        except BaseException as exc:      # handed over to the consumer, raised there
            put(exc, 0)

    reader = threading.Thread(target=read, name=f"log reader {log.path.name}", daemon=True)
    reader.start()
    try:
        while True:
            item, n = q.get()
            with room:
                held[0] -= n
                room.notify()
            if item is _END:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        with room:
            room.notify()
        reader.join(timeout=5)


def first_time_s(log: RunLog) -> float:
    row = log.conn.execute("SELECT t_us FROM sample_blocks ORDER BY block LIMIT 1").fetchone()
    return float(_unpack_delta(row[0])[0]) / 1e6 if row else 0.0


class Blips:
    """Blip events as columns (a night can hold a quarter of a million of them)."""

    def __init__(self, i=(), pos=(), direction=(), mode=()):
        self.i = np.asarray(i, dtype=np.int64)
        self.pos = np.asarray(pos, dtype=np.float64)
        self.dir = np.asarray(direction, dtype=np.int64)
        self.mode = np.asarray(mode, dtype=np.int64)

    def __len__(self) -> int:
        return int(self.i.size)

    @classmethod
    def from_log(cls, log: RunLog) -> "Blips":
        rows = log.conn.execute("SELECT i, COALESCE(pos, 'nan'), COALESCE(dir, 0), COALESCE(mode, -1) "
                                "FROM events WHERE kind='blip' ORDER BY i, id").fetchall()
        cols = np.array(rows, dtype=np.float64).reshape(-1, 4).T
        return cls(cols[0], cols[1], cols[2], cols[3])

    @staticmethod
    def rows(events: list) -> np.ndarray:
        """(index, position, direction, mode) of the blips among events, one row each."""
        rows = [(e.index, e.position_steps, e.direction, e.mode) for e in events if e.kind == "blip"]
        return np.array(rows, dtype=np.float64).reshape(-1, 4)

    @classmethod
    def from_rows(cls, parts: list[np.ndarray]) -> "Blips":
        cols = (np.concatenate(parts) if parts else np.zeros((0, 4))).T
        return cls(cols[0], cols[1], cols[2], cols[3])


class Replay:
    """Feeds a log's samples to a counter at a pace (None = as fast as possible)."""

    def __init__(self, log: RunLog, rig, counter, state: LiveState | None = None,
                 speed: float | None = 1.0, out_log: RunLog | None = None,
                 stop_flag: Callable[[], bool] | None = None, pause_flag: threading.Event | None = None):
        self.log, self.rig, self.counter = log, rig, counter
        self.state = state or LiveState()
        self.speed = speed
        self.out_log = out_log
        self.stop_flag = stop_flag or (lambda: False)
        self.pause_flag = pause_flag
        self.blips = Blips()       # filled at the end of the run
        self._blip_rows: list[np.ndarray] = []   # one small array a chunk: bounded, compact
        self.samples_done = 0
        self.wall_s = 0.0

    def _wait_until(self, t_wall: float) -> bool:
        """Sleep until the monotonic time t_wall (False if a stop came first)."""
        while True:
            if self.stop_flag():
                return False
            left = t_wall - time.monotonic()
            if left <= 0:
                return True
            time.sleep(min(left, 0.05))

    def _hold_while_paused(self) -> float:
        """Wait out a pause; returns the seconds spent, to shift the pacing clock."""
        if self.pause_flag is None or not self.pause_flag.is_set():
            return 0.0
        t0 = time.monotonic()
        self.state.paused = True
        while self.pause_flag.is_set() and not self.stop_flag():
            time.sleep(0.05)
        self.state.paused = False
        return time.monotonic() - t0

    def run(self) -> str:
        """Replay every sample; "finished", or "stopped" when stop_flag turned true."""
        st, counter, out = self.state, self.counter, self.out_log
        sweep = self.rig["sweep"]
        st.passes = sweep["passes"]
        st.total_samples = self.log.n_samples
        paced = self.speed is not None
        t_first = first_time_s(self.log) if paced else 0.0
        feed, keep, blip_rows = counter.feed, self._blip_rows.append, Blips.rows
        clock = time.monotonic
        t_start = clock()
        next_state = next_commit = t_start
        status = "finished"
        last = None
        for c in iter_chunks_ahead(self.log, with_time=paced, with_all=out is not None,
                                   max_samples=FLUSH_SAMPLES if paced else FAST_CHUNK_SAMPLES):
            if self.stop_flag():
                status = "stopped"
                break
            if self.pause_flag is not None:
                t_start += self._hold_while_paused()
            if paced and not self._wait_until(t_start + (float(c.t_s[-1]) - t_first) / self.speed):
                status = "stopped"
                break
            events = feed(c.position_steps, c.direction, c.value)
            if events:
                keep(blip_rows(events))
            self.samples_done += len(c)
            last = c
            if out is not None:
                self._write(c, events)
                now = clock()
                if now >= next_commit:
                    out.set_meta(counter_state=json.dumps(counter.get_state()))  # commits
                    next_commit = now + COMMIT_EVERY_S
            now = clock()
            if now >= next_state:
                self._show(c, events, now - t_start)
                next_state = now + STATE_EVERY_S
        if out is not None:
            out.set_meta(counter_state=json.dumps(counter.get_state()))
        final = self._finish_counting(last)
        self.wall_s = clock() - t_start
        if last is not None:
            self._show(last, final, self.wall_s)
        return status

    def _finish_counting(self, last: Chunk | None) -> list:
        """End of the stream, as the live run ends (Engine.finish_counting): the open crossing counts."""
        events = self.counter.finish()
        self._blip_rows.append(Blips.rows(events))
        self.blips = Blips.from_rows(self._blip_rows)
        self._blip_rows = []
        if self.out_log is not None and last is not None:
            self.out_log.append_events(self._event_rows(last, events), commit=True)
        return events

    def _write(self, c: Chunk, events) -> None:
        self.out_log.append_samples(c.t_s, c.position_steps, c.direction, c.pass_index, c.value, c.spread,
                                    c.aux, commit=False)
        self.out_log.append_events(self._event_rows(c, events))

    @staticmethod
    def _event_rows(c: Chunk, events) -> list[tuple]:
        """Event rows as the engine logs them, timed by the sample they belong to."""
        n = len(c)
        return [(ev.index, float(c.t_s[min(max(ev.index - c.first_i, 0), n - 1)]), ev.kind,
                 ev.position_steps, ev.direction, ev.mode if ev.kind == "blip" else None,
                 ev.height, ev.width_steps, None) for ev in events]

    def _show(self, c: Chunk, events, t_run_s: float) -> None:
        """Refresh the dashboard's LiveState (throttled: drawing is a few Hz anyway)."""
        st = self.state
        n = len(c)
        end = c.first_i + n
        st.samples = end
        st.samples_done_this_run = self.samples_done
        st.t_run_s = t_run_s
        st.position_steps = int(c.position_steps[-1])
        st.direction = int(c.direction[-1])
        st.pass_index = int(c.pass_index[-1])
        st.passes = max(st.passes, st.pass_index + 1)  # logs may run more passes than the rig says
        if c.t_s is not None:
            st.t_s = float(c.t_s[-1])
        k = min(n, st.recent.maxlen or n)
        st.recent.extend(zip(range(end - k, end), c.value[n - k:].tolist()))
        st.recent_blips.extend(ev.index for ev in events if ev.kind == "blip")
        st.estimate = self.counter.estimate()


# --- comparing two counts ---------------------------------------------------------

def _nearest(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Index into sorted b of the element nearest each element of a (b not empty)."""
    j = np.clip(np.searchsorted(b, a), 1, b.size - 1) if b.size > 1 else np.zeros(a.size, np.int64)
    if b.size > 1:
        j = np.where(np.abs(b[j - 1] - a) <= np.abs(b[j] - a), j - 1, j)
    return j


def _match(a: np.ndarray, b: np.ndarray, tol: float) -> tuple[np.ndarray, np.ndarray]:
    """Pair sorted sample indices: a[i] and b[j] pair when each is the other's nearest, within tol.

    Returns the paired positions (i, j) as two index arrays.
    """
    if a.size == 0 or b.size == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    ja, jb = _nearest(a, b), _nearest(b, a)
    mutual = (jb[ja] == np.arange(a.size)) & (np.abs(a - b[ja]) <= tol)
    return np.flatnonzero(mutual), ja[mutual]


def _listed(blips: Blips, idx: np.ndarray) -> list[dict]:
    return [{"i": int(blips.i[k]), "position_steps": round(float(blips.pos[k]), 2),
             "direction": int(blips.dir[k]), "mode": int(blips.mode[k])} for k in idx[:LISTED]]


def _modes_listed(blips: Blips, modes: list[int]) -> list[dict]:
    pos = np.asarray(blips.pos)
    m = np.asarray(blips.mode)
    out = []
    for mode in modes[:LISTED]:
        at = pos[m == mode]
        out.append({"mode": int(mode), "positions_steps": [round(float(p), 2) for p in at[:8]]})
    return out


def _many_to_one(src: np.ndarray, dst: np.ndarray) -> list[int]:
    """Modes of src whose paired blips fall into more than one mode of dst."""
    if src.size == 0:
        return []
    pairs = np.unique(np.stack([src, dst]), axis=1)
    keys, counts = np.unique(pairs[0], return_counts=True)
    return [int(k) for k in keys[counts > 1]]


def compare_blips(logged: Blips, replayed: Blips) -> dict:
    """What the replay counted differently from the logged run: blips and modes, and where.

    Blips are paired by sample index (the same samples, so the same blip lands
    on nearly the same sample whatever the settings) within 40 % of the usual
    gap between blips. A mode is lost when none of its logged blips pairs with
    a replayed one, gained the other way round; paired blips can still be
    numbered differently: a logged mode split over two replayed modes, or two
    merged into one. Then modes(replay) = modes(logged) - lost + gained + renumbered.
    """
    oa, ob = np.argsort(logged.i, kind="stable"), np.argsort(replayed.i, kind="stable")
    a = np.asarray(logged.i, dtype=np.int64)[oa]
    b = np.asarray(replayed.i, dtype=np.int64)[ob]
    gaps = np.diff(a if a.size > 1 else b)
    gaps = gaps[gaps > 0]
    tol = max(2.0, 0.4 * float(np.median(gaps))) if gaps.size else 2.0
    pa, pb = _match(a, b, tol)
    ma, mb = np.zeros(a.size, bool), np.zeros(b.size, bool)
    ma[pa], mb[pb] = True, True
    lost, gained = oa[~ma], ob[~mb]
    la, lb = np.asarray(logged.mode)[oa], np.asarray(replayed.mode)[ob]
    modes_lost = sorted(set(la.tolist()) - set(la[ma].tolist()) - {-1})
    modes_gained = sorted(set(lb.tolist()) - set(lb[mb].tolist()) - {-1})
    pl, pr = la[pa], lb[pb]
    valid = (pl != -1) & (pr != -1)
    pl, pr = pl[valid], pr[valid]
    return {
        "blips_lost": int(lost.size), "blips_gained": int(gained.size),
        "lost": _listed(logged, lost), "gained": _listed(replayed, gained),
        "modes_lost": _modes_listed(logged, modes_lost), "modes_gained": _modes_listed(replayed, modes_gained),
        "renumbered": len(set(pr.tolist())) - len(set(pl.tolist())),
        "modes_split": _many_to_one(pl, pr)[:LISTED], "modes_merged": _many_to_one(pr, pl)[:LISTED],
        "match_tolerance_samples": tol,
    }


def changes(logged_summary: dict | None, logged: Blips, result: dict, replayed: Blips) -> dict:
    """The replay's result against the logged run's: headline numbers, then blips and modes."""
    ref = dict(logged_summary or {})
    if not ref and len(logged):
        ref = {"modes": len(set(logged.mode.tolist()) - {-1}), "crossings": len(logged)}
    out: dict = {"logged": {k: ref.get(k) for k in ("modes", "crossings", "spacing_steps", "spacing_nm", "length_um")
                            if k in ref}}
    out.update(compare_blips(logged, replayed))
    if not len(logged):
        out["note"] = "the logged run holds no counted blips to compare with"
    same_numbers = all(result.get(k) == ref.get(k) for k in ("modes", "crossings"))
    out["identical"] = (bool(len(logged)) and same_numbers and out["blips_lost"] == out["blips_gained"] == 0
                        and not out["modes_split"] and not out["modes_merged"])
    return out
