"""Engine watchdogs on the simulated rig: full disk, a stage that does not get there, a stuck detector,
a scan held up."""
import re

import pytest

from analysis.counter import StreamCounter
from daq import engine as engine_mod
from daq.engine import Engine, LiveState
from daq.rig import load_rig
from daq.runlog import RunLog
from drivers.base import DeviceError, Reading
from drivers.registry import open_devices


def _engine(tmp_path, rig, stage=None, detector=None):
    s, d, _ = open_devices(rig.sections)
    log = RunLog.create(tmp_path / "run.db", rig)
    return Engine(rig, stage or s, detector or d, StreamCounter(rig["counter"]), log, LiveState()), log


def test_low_disk_stops_the_run_and_keeps_the_samples(tmp_path, monkeypatch):
    rig = load_rig(None, ["sweep.settle_s=0"])
    eng, log = _engine(tmp_path, rig)
    # The real disk check, with the threshold set above any disk's free space.
    monkeypatch.setattr(engine_mod, "MIN_FREE_BYTES", 10**18)
    with pytest.raises(DeviceError, match="disk: only"):
        eng.run()
    assert log.n_samples > 0 and len(log.read_samples()) == log.n_samples


class LazyStage:
    """A stage whose controller stops 5 steps short of every target (a stalled screw)."""

    name = "lazy"

    def __init__(self, inner):
        self.inner, self.pos = inner, 0

    def identify(self):
        return "lazy"

    def move_to(self, target):
        self.inner.move_to(target)
        self.pos = target - 5

    def position_steps(self):
        return self.pos

    def stop(self):
        pass

    def close(self):
        pass


def test_stage_that_does_not_reach_its_target_faults_at_the_turn(tmp_path):
    rig = load_rig(None, ["sweep.settle_s=0"])
    s, _, _ = open_devices(rig.sections)
    eng, log = _engine(tmp_path, rig, stage=LazyStage(s))
    with pytest.raises(DeviceError, match="did not reach its target"):
        eng.run()
    # The fault comes at the first turning point, with the whole first pass logged.
    assert log.n_samples == 4001


class StuckDetector:
    name = "stuck"

    def identify(self):
        return "stuck"

    def read(self):
        return Reading(0.25)

    def close(self):
        pass


def test_detector_returning_one_value_is_warned_about(tmp_path):
    rig = load_rig(None, ["sweep.settle_s=0", "sweep.stop=2000", "sweep.passes=1"])
    eng, log = _engine(tmp_path, rig, detector=StuckDetector())
    assert eng.run() == "finished"
    warnings = [e for e in log.events("warning") if "times in a row" in (e["detail"] or "")]
    assert len(warnings) == 1


class StallingDetector:
    """The simulated detector, with the reading loop held up once (a loaded computer)."""

    def __init__(self, inner, after_reads: int, stall_s: float):
        self.inner, self.after, self.stall_s, self.reads = inner, after_reads, stall_s, 0
        self.name = inner.name

    def __getattr__(self, attr):
        return getattr(self.inner, attr)

    def read(self):
        self.reads += 1
        if self.reads == self.after:
            import time
            time.sleep(self.stall_s)
        return self.inner.read()


def test_a_held_up_scan_logs_the_gap_it_leaves(tmp_path):
    # At 1000 steps/s the stage moves on while nothing is read: a 0.3 s hold-up leaves
    # about 300 steps unread. The run goes on, and the log says where and why.
    rig = load_rig(None, ['sweep.mode="scan"', "sweep.speed_steps_per_s=1000", "sweep.passes=1"])
    s, d, _ = open_devices(rig.sections)
    # the simulated meter answers ~10^5 times a second: the hold-up comes mid-pass
    eng, log = _engine(tmp_path, rig, stage=s, detector=StallingDetector(d, 100_000, 0.3))
    eng.run()
    gaps = [e for e in log.events("warning") if "scan gap" in (e["detail"] or "")]
    held = [float(re.search(r"held up ([0-9.]+) s", e["detail"]).group(1)) for e in gaps]
    pos = log.read_samples().position_steps
    widest = int(max(abs(pos[1:] - pos[:-1])))
    # (a loaded machine may add gaps of its own; this one must be among them)
    assert widest > 100 and max(held) >= 0.29, [e["detail"] for e in gaps]
    # the run went on to the end of its pass (how densely depends on the machine's load)
    assert log.meta("status") != "faulted" and pos.max() >= 4990 and len(pos) > 1000


def _run_with_a_pause(eng, pause, after_samples: int, while_paused) -> str:
    """eng.run(), paused (pause set) once after_samples are shown; while_paused() runs
    once the engine says it is paused, then the run goes on."""
    import threading
    import time

    def watch():
        deadline = time.monotonic() + 60
        while eng.state.samples < after_samples and time.monotonic() < deadline:
            time.sleep(0.005)
        pause.set()
        while not eng.state.paused and time.monotonic() < deadline:
            time.sleep(0.001)
        while_paused()
        pause.clear()
    w = threading.Thread(target=watch, daemon=True)
    w.start()
    status = eng.run()
    w.join(timeout=60)
    return status


class SlowCounter(StreamCounter):
    """The counter, on a computer slow to count (each chunk takes 0.2 s)."""

    def feed(self, *args):
        import time
        time.sleep(0.2)
        return super().feed(*args)


def test_pause_shows_the_count_of_every_sample_taken(tmp_path):
    # When the dashboard says PAUSED, the writer thread has counted every sample taken
    # before the pause, however slow it is: the count on screen is the count at the pause.
    import threading
    rig = load_rig(None, ["sweep.settle_s=0.0005", "sweep.passes=1"])   # ~2 s of sweeping
    s, d, _ = open_devices(rig.sections)
    log = RunLog.create(tmp_path / "run.db", rig)
    pause = threading.Event()
    eng = Engine(rig, s, d, SlowCounter(rig["counter"]), log, LiveState(), pause_flag=pause)
    seen = {}

    def at_pause():
        seen["shown"], seen["taken"] = eng.state.samples, eng._n_written
    _run_with_a_pause(eng, pause, 500, at_pause)
    log.close()
    assert 500 < seen["taken"] < 4000, seen          # paused mid-sweep
    assert seen["shown"] == seen["taken"]


def test_the_counter_state_in_the_log_has_seen_every_logged_sample(tmp_path):
    # A run shorter than the commit interval: its last chunk is written within a second of
    # the previous commit. The counter state the log keeps for --resume must still be the
    # one that has seen exactly the samples logged (else a resume's indices slip).
    import json
    rig = load_rig(None, ["sweep.settle_s=0.0015", "sweep.passes=1", "sweep.stop=1400"])   # ~0.6 s, 3 chunks
    s, d, _ = open_devices(rig.sections)
    log = RunLog.create(tmp_path / "short.db", rig)
    eng = Engine(rig, s, d, StreamCounter(rig["counter"]), log, LiveState())
    assert eng.run() == "finished"
    state = json.loads(log.meta("counter_state"))
    assert log.n_samples == 401 and state["_n"] == log.n_samples
    log.close()


def test_events_carry_the_time_of_their_sample_and_a_pause_its_length(tmp_path):
    # The counter reports a blip after its sample (the baseline looks ahead; the first
    # blips wait for the spacing): its time in the log must be its sample's, not the time
    # it was written. A pause's "paused" and "resumed" events are as far apart as the pause.
    import threading
    import time
    rig = load_rig(None, ["sweep.settle_s=0.0005", "sweep.passes=2"])
    s, d, _ = open_devices(rig.sections)
    log = RunLog.create(tmp_path / "times.db", rig)
    pause = threading.Event()
    eng = Engine(rig, s, d, StreamCounter(rig["counter"]), log, LiveState(), pause_flag=pause)
    assert _run_with_a_pause(eng, pause, 3000, lambda: time.sleep(0.6)) == "finished"
    eng.finish_counting()
    t = log.read_samples().t_s
    blips = log.events("blip")
    assert len(blips) > 100
    assert all(abs(e["t_s"] - t[e["i"]]) <= 1e-6 for e in blips)      # the log keeps microseconds
    status = {e["detail"]: e["t_s"] for e in log.events("status")}
    assert status["resumed"] - status["paused"] >= 0.55
    log.close()
