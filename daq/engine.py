"""The sweep engine: step the stage, read the detector, count, log.

One loop in the calling thread. Per step it only moves, waits, reads and
appends to Python lists; every FLUSH_S seconds (or FLUSH_SAMPLES samples) the
buffered chunk goes through the streaming counter and into the log in one
transaction, and the shared LiveState is updated for the dashboard, which
renders from its own thread. So neither counting nor drawing slows the step
rate, and a killed process loses at most one flush interval of samples.
"""
from __future__ import annotations

import collections
import math
import queue
import shutil
import sys
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from daq import schedule
from drivers.base import DeviceError, Reading

FLUSH_S = 0.25        # chunks go to the counter (and the dashboard) this often
COMMIT_S = 1.0        # ... and are committed to the log with the counter state this often
FLUSH_SAMPLES = 4096
TIME_RING = 1 << 20   # sample times kept to date the events reported after their samples (8 MB)
PAUSE_WAIT_S = 5.0    # at a pause, the longest wait for the writer to count what was taken
RECENT = 900          # readings kept for the dashboard's strip chart
STALL_READS = 500     # identical readings in a row before the detector is called stuck
MIN_FREE_BYTES = 50_000_000
POSITION_TOLERANCE_STEPS = 1
SCAN_POLL_S = 0.05   # how often a scanning stage is asked where it is
SCAN_GAP_STEPS = 10  # a scan jump over more unread steps than this (and than 4x the usual
                     # jump) is logged as a gap: the reading loop was held up


@dataclass
class LiveState:
    """What the dashboard shows; written by the engine, read by the renderer."""

    title: str = "modetick sweep"
    log_path: str = ""
    total_samples: int = 0
    passes: int = 1
    samples: int = 0
    position_steps: int = 0
    direction: int = 1
    pass_index: int = 0
    t_s: float = 0.0
    estimate: dict = field(default_factory=dict)
    calib: Any = None                       # callable(spacing_steps) -> dict or None
    recent: collections.deque = field(default_factory=lambda: collections.deque(maxlen=RECENT))
    recent_blips: collections.deque = field(default_factory=lambda: collections.deque(maxlen=64))
    events: collections.deque = field(default_factory=lambda: collections.deque(maxlen=8))
    status: str = "running"
    paused: bool = False
    aux: dict = field(default_factory=dict)

    samples_done_this_run: int = 0          # samples taken by this process (rate, time left)
    t_run_s: float = 0.0

    def rate_per_s(self) -> float:
        return self.samples_done_this_run / self.t_run_s if self.t_run_s > 0 else 0.0


class StopRequested(Exception):
    pass


class _Writer:
    """One thread that counts and logs the chunks the loop hands over, in order.

    A failure in it (a full disk, a broken file) is kept and raised in the
    loop's thread at the next hand-over, so it stops the run like a device
    fault would.
    """

    def __init__(self, write):
        self._write = write
        self._q: queue.Queue = queue.Queue(maxsize=16)
        self.error: BaseException | None = None
        self.failed = False   # once a write failed, nothing more is written (no retry on a bad disk)
        self._thread = threading.Thread(target=self._loop, name="modetick-writer", daemon=True)
        self._thread.start()

    def _loop(self) -> None:
        while True:
            item = self._q.get()
            try:
                if item is None:
                    return
                if not self.failed:
                    try:
                        self._write(item)
                    except BaseException as exc:  # noqa: BLE001 - handed to the loop's thread
                        self.error, self.failed = exc, True
            finally:
                self._q.task_done()

    def wait_written(self, timeout_s: float) -> bool:
        """Wait until every chunk handed over is counted and logged (at most timeout_s)."""
        deadline = time.monotonic() + timeout_s
        with self._q.all_tasks_done:
            while self._q.unfinished_tasks:
                left = deadline - time.monotonic()
                if left <= 0:
                    return False
                self._q.all_tasks_done.wait(left)
        return True

    def put(self, item) -> None:
        self.raise_error()
        self._q.put(item)

    def raise_error(self) -> None:
        if self.error is not None:
            err, self.error = self.error, None
            raise err

    def close(self) -> None:
        """Write everything handed over, then stop the thread."""
        self._q.put(None)
        self._thread.join()


class Engine:
    """Runs one sweep schedule against opened devices."""

    def __init__(self, rig, stage, detector, counter, log, state: LiveState | None = None,
                 stop_flag: Callable[[], bool] | None = None, pause_flag: threading.Event | None = None,
                 t0_s: float = 0.0):
        self.rig, self.stage, self.detector = rig, stage, detector
        self.counter, self.log = counter, log
        self.state = state or LiveState()
        self.stop_flag = stop_flag or (lambda: False)
        self.pause_flag = pause_flag
        self.t0_s = t0_s              # time offset when resuming, so t_s keeps growing
        self._buf: dict[str, list] = {k: [] for k in ("t", "pos", "dir", "pass", "val", "spr")}
        self._aux: dict[str, list] = {}
        self._pending_events: list[tuple] = []
        self._warned: set[str] = set()
        self._n_written = log.n_samples   # samples handed to the writer so far (all runs of this log)
        self._writer: _Writer | None = None
        self._next_commit = 0.0
        self.critical = False          # inside the buffer hand-over (see flush)
        self.abort_pending = False     # a second interrupt arrived during it
        # Scan mode, resuming: the pass and position of the last logged sample
        # (set by the caller from the log before run()).
        self._resume_pass, self._resume_pos = 0, None
        self.passes_announced = 0     # "pass" events already in the log (a resumed run's)
        self._paused_s = 0.0          # time spent paused (not in the rate)
        self._counted_out = False     # finish_counting done
        # the times of the last TIME_RING samples logged by this process, by sample index: an
        # event is reported after its sample (the baseline looks ahead; the first blips are
        # held until the spacing is known), and its time is its sample's
        self._t_ring = np.zeros(TIME_RING)
        self._ring_lo = self._n_written
        self._t_start: float | None = None
        self._last_value = None
        self._same_count = 0

    # -- events -------------------------------------------------------------
    def note(self, kind: str, detail: str, pos: float | None = None) -> None:
        """Record a non-blip event (pass, warning, fault, status), at the time it happens."""
        i = self._n_written + len(self._buf["val"])
        t = self.state.t_s if self._t_start is None else self.t0_s + (time.monotonic() - self._t_start)
        self._pending_events.append((i, t, kind, pos, None, None, None, None, detail))
        self.state.events.append((kind, detail))

    # -- the loop -------------------------------------------------------------
    def run(self, skip_recorded: int = 0) -> str:
        """Run (the rest of) the schedule. Returns "finished" or "stopped";
        device faults propagate as DeviceError after the data is flushed."""
        sweep = self.rig["sweep"]
        st = self.state
        st.passes = sweep["passes"]
        st.total_samples = schedule.recorded_count(sweep)
        st.samples = self.log.n_samples
        self._t_start = time.monotonic()
        self._next_flush = self._t_start + FLUSH_S
        self._writer = _Writer(self._write)
        status = "finished"
        switch = sys.getswitchinterval()
        if sweep["mode"] == "scan":
            sys.setswitchinterval(0.0005)   # the writer must not hold the reader off for long
        try:
            try:
                if sweep["mode"] == "scan":
                    self._run_scan(skip_recorded)
                else:
                    self._run_steps(skip_recorded)
            except StopRequested:
                status = "stopped"
            except BaseException:
                self.flush()   # keep every sample up to the fault or interrupt
                raise
            self.flush()
        finally:
            writer, self._writer = self._writer, None
            writer.close()     # every handed-over chunk is in the log before we return
            sys.setswitchinterval(switch)
            if not writer.failed:
                # the last chunk may have come within a second of the last commit: commit
                # it now with the counter state that has seen it, so a resume lines up
                self.log.set_meta(counter_state=_json_state(self.counter))
            st.t_run_s = time.monotonic() - self._t_start - self._paused_s
        writer.raise_error()
        return status

    def _between_steps(self, can_pause: bool = True) -> None:
        if self.stop_flag():
            raise StopRequested
        if self.pause_flag is not None and self.pause_flag.is_set():
            if can_pause:
                self._pause()
            else:
                # A scanning stage keeps moving: pausing would leave a hole in the pass.
                self.pause_flag.clear()
                self._warn_once("scan-pause", "pause is not available during a continuous scan; "
                                              "stop with q and resume the log instead")

    def _new_pass(self, pass_index: int, direction: int, target: int, announce: bool) -> None:
        if announce and pass_index >= self.passes_announced:   # a resumed pass is not announced twice
            self.note("pass", f"pass {pass_index + 1} of {self.rig['sweep']['passes']} "
                              f"({'up' if direction > 0 else 'down'})", target)
        self.state.pass_index, self.state.direction = pass_index, direction

    def _run_steps(self, skip_recorded: int) -> None:
        sweep = self.rig["sweep"]
        settle_s, dwell_s = sweep["settle_s"], sweep["dwell_s"]
        st = self.state
        last_pass = prev_target = None
        move_to, read, take = self.stage.move_to, self.detector.read, self._take
        for mv in schedule.moves(sweep, skip_recorded):
            self._between_steps()
            if mv.pass_index != last_pass:
                if last_pass is not None:
                    self._check_position(prev_target)
                self._new_pass(mv.pass_index, mv.direction, mv.target_steps,
                               last_pass is not None or skip_recorded > 0)
                last_pass = mv.pass_index
            move_to(mv.target_steps)
            prev_target = mv.target_steps
            st.position_steps = mv.target_steps
            if not mv.record:
                if dwell_s:
                    time.sleep(dwell_s)
                continue
            if settle_s:
                time.sleep(settle_s)
            take(mv.target_steps, mv.direction, mv.pass_index, read())
        if prev_target is not None:
            self._check_position(prev_target)

    def _run_scan(self, skip_recorded: int) -> None:
        """Continuous scan: the stage moves at constant speed while the detector
        is read as fast as it answers. Each reading's position comes from the
        stage's last position report, carried forward by speed x elapsed time
        (reports are polled every SCAN_POLL_S, not per reading, so a slow
        controller does not slow the reads)."""
        stage = self.stage
        if not hasattr(stage, "start_scan"):
            raise DeviceError(f"stage {stage.name}: this driver cannot scan at constant speed; "
                              "use [sweep] mode = \"step\"")
        sweep = self.rig["sweep"]
        speed = sweep["speed_steps_per_s"]
        pts = schedule.pass_points(sweep)
        first, last = pts[0], pts[-1]
        d0 = 1 if last > first else -1
        take_up = schedule.takeup_steps(sweep)
        start_pass, resume_pos = 0, None
        if skip_recorded:
            # Resume in the pass of the last logged sample, one step past it.
            start_pass, resume_pos = self._resume_pass, self._resume_pos
        read, clock = self.detector.read, time.monotonic
        for p in range(start_pass, sweep["passes"]):
            d = d0 if p % 2 == 0 else -d0
            begin, end = (first, last) if d == d0 else (last, first)
            if p == start_pass and resume_pos is not None:
                if (end - resume_pos) * d <= 0:
                    continue          # that pass was complete
                begin = resume_pos + d
            self._between_steps()
            self._new_pass(p, d, begin, p > 0)
            stage.move_to(self._clamp(begin - d * take_up))   # take up backlash
            stage.move_to(begin)
            stage.start_scan(end, speed)
            t_q, p_q, moving = clock(), stage.position_steps(), True
            acc_pos, acc = None, []
            usual, jumps, t_read = 1.0, 0, clock()
            while True:
                self._between_steps(can_pause=False)
                r = read()
                now = clock()
                if now - t_q >= SCAN_POLL_S or not moving:
                    p_q, t_q, moving = stage.position_steps(), now, stage.is_moving()
                pos = p_q + d * speed * (now - t_q) if moving else p_q
                pos = int(round(min(max(pos, min(begin, end)), max(begin, end))))
                # Positions never step back within a pass: a late position report
                # must not make the same steps appear twice.
                if acc_pos is not None and (pos - acc_pos) * d < 0:
                    pos = acc_pos
                self.state.position_steps = pos
                # Readings are binned to one sample per step (mean and spread), so the
                # log and the counter see the same sampling as a stepped sweep
                # whatever the detector's rate.
                if pos != acc_pos and acc:
                    self._take(acc_pos, d, p, _mean_reading(acc))
                    acc = []
                    jump = abs(pos - acc_pos)
                    if jumps >= 8 and jump > max(SCAN_GAP_STEPS, 4 * usual):
                        self.note("warning", f"scan gap: steps {acc_pos + d}..{pos - d} not read "
                                             f"(the reading loop was held up {now - t_read:.2f} s; "
                                             "slow the scan or lighten the computer's load)", pos)
                    else:
                        usual, jumps = 0.9 * usual + 0.1 * jump, jumps + 1
                acc_pos, t_read = pos, now
                acc.append(r)
                if not moving:
                    break
            if acc:
                self._take(acc_pos, d, p, _mean_reading(acc))
            self._check_position(end)

    def reapproach(self, skip_recorded: int) -> None:
        """Before resuming: back off and come to the next point from the sweep's
        direction, so the backlash is taken up as in an uninterrupted run."""
        nxt = next(schedule.moves(self.rig["sweep"], skip_recorded))
        self.stage.move_to(self._clamp(nxt.target_steps - nxt.direction * schedule.takeup_steps(self.rig["sweep"])))

    def _clamp(self, target: int) -> int:
        lo, hi = self.rig["stage"]["min_steps"], self.rig["stage"]["max_steps"]
        if lo is not None:
            target = max(target, lo)
        if hi is not None:
            target = min(target, hi)
        return target

    def _take(self, pos: int, direction: int, pass_index: int, r) -> None:
        """Buffer one reading; flush when the interval or the chunk is full."""
        buf = self._buf
        now = time.monotonic()
        t = self.t0_s + (now - self._t_start)
        buf["t"].append(t)
        buf["pos"].append(pos)
        buf["dir"].append(direction)
        buf["pass"].append(pass_index)
        vals = buf["val"]
        vals.append(r.value)
        buf["spr"].append(r.spread)
        if r.aux:
            if r.aux.get("saturated"):
                self._warn_once("saturated", "detector saturated: readings are clipped "
                                             "(lower the gain or the exposure)", pos)
            self._add_aux(r.aux, len(vals))
        self.state.recent.append((self._n_written + len(vals) - 1, r.value))
        if r.value == self._last_value:
            self._same_count += 1
            if self._same_count == STALL_READS:
                self.note("warning", f"detector returned {r.value!r} {STALL_READS} times in a row: "
                                     "stuck, disconnected or saturated?", pos)
        else:
            self._same_count, self._last_value = 0, r.value
        if now >= self._next_flush or len(vals) >= FLUSH_SAMPLES:
            self.state.t_s = t
            self.state.t_run_s = now - self._t_start - self._paused_s     # the rate leaves pauses out
            self.flush()
            self._next_flush = now + FLUSH_S

    def finish_counting(self) -> None:
        """End of the stream: the counter's last open crossing is counted and logged.

        The counter state in the log stays the one saved with the last block,
        so a run stopped here can still be resumed as if never finished; these
        events are marked provisional, and a resume drops them (the restored
        counter counts them again). Only once: later calls do nothing.
        """
        if self._counted_out:
            return
        self._counted_out = True
        self.log.mark_provisional_events()
        events = self.counter.finish()
        rows = [(ev.index, self._time_of(ev.index, self.state.t_s), ev.kind, ev.position_steps, ev.direction,
                 ev.mode if ev.kind == "blip" else None, ev.height, ev.width_steps, None) for ev in events]
        self.log.append_events(rows, commit=True)
        self.state.estimate = self.counter.estimate()

    def _time_of(self, i: int, fallback: float) -> float:
        """The logged time of sample i, if this process logged it and it is still in the ring."""
        if self._ring_lo <= i < self._n_written and self._n_written - i <= TIME_RING:
            return float(self._t_ring[i % TIME_RING])
        return fallback

    def _warn_once(self, key: str, detail: str, pos: float | None = None) -> None:
        if key not in self._warned:
            self._warned.add(key)
            self.note("warning", detail, pos)

    def _check_position(self, target: int) -> None:
        """Watchdog at each turning point: the stage must report where it was sent.

        Checked once a pass, not per step, so a slow controller query does not
        set the pace of the sweep.
        """
        reported = self.stage.position_steps()
        if abs(reported - target) > POSITION_TOLERANCE_STEPS:
            raise DeviceError(f"stage {self.stage.name}: reports {reported} steps after a move to "
                              f"{target}; it did not reach its target (stalled, or at an end stop?)")

    def _add_aux(self, aux: dict, n_now: int) -> None:
        for k, v in aux.items():
            col = self._aux.setdefault(k, [])
            col.extend([float("nan")] * (n_now - 1 - len(col)))
            col.append(float(v))
        self.state.aux = dict(aux)

    def _pause(self) -> None:
        self.flush()
        if self._writer is not None:
            # the dashboard shows PAUSED with the count of every sample taken
            self._writer.wait_written(PAUSE_WAIT_S)
        self.state.paused = True
        self.note("status", "paused")
        t_pause = time.monotonic()
        while self.pause_flag.is_set() and not self.stop_flag():
            time.sleep(0.05)
        self._paused_s += time.monotonic() - t_pause
        self.state.paused = False
        self.note("status", "resumed")

    def flush(self) -> None:
        """Hand the buffered chunk to the writer: counted and logged in one transaction.

        Only the buffer swap happens here; the counting, the SQLite write and
        the counter-state snapshot run in the writer thread, so the step or
        scan loop is never held up by them. The swap is a critical section:
        a second Ctrl-C arriving in it is held (``abort_pending``) and raised
        right after, so a chunk is never lost or logged twice. Without a
        running writer (before run() or after it) the chunk is written here.
        """
        self.critical = True
        try:
            chunk = self._swap()
            if self._writer is not None:
                self._writer.put(chunk)
            else:
                self._write(chunk)
        finally:
            self.critical = False
        if self.abort_pending:
            self.abort_pending = False
            raise KeyboardInterrupt

    def _swap(self) -> tuple:
        buf = self._buf
        n = len(buf["val"])
        chunk = None
        if n:
            aux = None
            if self._aux:
                aux = {k: (v + [float("nan")] * (n - len(v))) for k, v in self._aux.items()}
            chunk = (self._n_written, np.asarray(buf["t"], dtype=np.float64),
                     np.asarray(buf["pos"], dtype=np.int64), np.asarray(buf["dir"], dtype=np.int64),
                     np.asarray(buf["pass"], dtype=np.int64), np.asarray(buf["val"], dtype=np.float64),
                     np.asarray(buf["spr"], dtype=np.float64), aux)
            self._n_written += n
            for k in buf:
                buf[k].clear()
            self._aux.clear()
        events, self._pending_events = self._pending_events, []
        return chunk, events

    def _write(self, item: tuple) -> None:
        """Count and log one chunk (writer thread, or the caller when none runs)."""
        chunk, notes = item
        st = self.state
        if chunk is not None:
            first_i, t_arr, pos, direction, pass_index, value, spread, aux = chunk
            n = value.size
            events = self.counter.feed(pos, direction, value)
            j = first_i % TIME_RING                    # the chunk's times into the ring
            k = min(n, TIME_RING - j)
            self._t_ring[j:j + k] = t_arr[:k]
            self._t_ring[:n - k] = t_arr[k:]
            self.log.append_samples(t_arr, pos, direction, pass_index, value, spread, aux, commit=False)
            rows = []
            for ev in events:
                t_ev = self._time_of(ev.index, float(t_arr[0]))
                rows.append((ev.index, t_ev, ev.kind, ev.position_steps, ev.direction,
                             ev.mode if ev.kind == "blip" else None, ev.height, ev.width_steps, None))
                if ev.kind == "blip":
                    st.recent_blips.append(ev.index)
            self.log.append_events(rows)
            st.samples = self.log.n_samples
            st.samples_done_this_run += n
            st.estimate = self.counter.estimate()
        self.log.append_events(notes)
        now = time.monotonic()
        if now >= self._next_commit or chunk is None or self._writer is None:
            # Samples, events and the counter state that has seen exactly them, in one
            # transaction: a killed run loses at most COMMIT_S and resumes consistently.
            self.log.set_meta(counter_state=_json_state(self.counter))  # commits
            self._next_commit = now + COMMIT_S
            self._check_disk()

    def _check_disk(self) -> None:
        free = shutil.disk_usage(self.log.path.parent).free
        if free < MIN_FREE_BYTES:
            raise DeviceError(f"disk: only {free // 1_000_000} MB free beside {self.log.path}; stopped to keep the log intact")


def _mean_reading(readings: list) -> Reading:
    """Mean of several readings, their standard deviation as the spread."""
    n = len(readings)
    if n == 1:
        return readings[0]
    vals = [r.value for r in readings]
    mean = sum(vals) / n
    spread = math.sqrt(sum((v - mean) ** 2 for v in vals) / (n - 1))
    return Reading(mean, spread, dict(readings[-1].aux))


def _json_state(counter) -> str:
    import json
    return json.dumps(counter.get_state())
