"""Replay through the simulator: the real sweep engine run against a logged sweep.

The logged sweep is a live run of the engine on the simulated bench; the checks
compare the replayed run with that live run and with the simulator's own truth
(its backlash parameter, its mode count and spacing), never with the replay's
own output.
"""
import numpy as np
import pytest

from analysis.counter import StreamCounter
from daq import schedule
from daq.engine import Engine, LiveState
from daq.rig import load_rig
from daq.runlog import RunLog
from drivers.base import DeviceError, LimitError
from sims.instruments import SimBench
from sims.replay_detector import ReplayBench, Recording, bench_from_log, check_replay_settings

BACKLASH = ["sweep.settle_s=0", 'sim.scenario="backlash"']


def _run(rig, stage, detector, path):
    log = RunLog.create(path, rig)
    counter = StreamCounter(rig["counter"])
    assert Engine(rig, stage, detector, counter, log, LiveState()).run() == "finished"
    log.close()
    return counter


@pytest.fixture(scope="module")
def live(tmp_path_factory):
    """A two-pass live run of the engine on the simulated bench with a 35-step dead band."""
    rig = load_rig(None, BACKLASH)
    bench = SimBench(rig.sections)
    path = tmp_path_factory.mktemp("live") / "live.db"
    counter = _run(rig, bench.stage, bench.detector, path)
    return rig, path, counter, bench.truth()


def test_dead_band_is_found_in_the_log(live):
    rig, path, _, _ = live
    rb = bench_from_log(path)
    # The simulator's own dead band for this scenario (sims/scenarios.py "backlash").
    assert rb.b == pytest.approx(35.0, abs=0.5)
    assert rb.describe().startswith(f"replay of {path} (up and down")


def test_same_schedule_counts_what_the_rig_counted(live, tmp_path):
    rig, path, counter_live, truth = live
    rb = bench_from_log(path, min_steps=rig["stage"]["min_steps"], max_steps=rig["stage"]["max_steps"])
    counter = _run(rig, rb.stage, rb.detector, tmp_path / "replayed.db")
    assert counter.modes == counter_live.modes
    assert abs(counter.crossings - counter_live.crossings) <= 1
    assert abs(counter.modes - truth["modes"]) <= 1
    # Moving up the mount sits where the screw is: the up pass is served exactly as logged.
    a = RunLog.open(path).read_samples()
    b = RunLog.open(tmp_path / "replayed.db").read_samples()
    up = a.direction > 0
    assert np.array_equal(a.position_steps, b.position_steps)
    assert np.array_equal(a.value[up], b.value[up])


def test_another_schedule_runs_against_the_log(live, tmp_path):
    """Three passes at two steps a sample: a schedule the log was never taken with.

    The replayed mount must count what the simulated rig itself counts on that
    schedule, and both must agree with the simulator's truth.
    """
    rig, path, _, truth = live
    other = load_rig(None, BACKLASH + ["sweep.step=2", "sweep.passes=3"])
    rb = bench_from_log(path, min_steps=0, max_steps=20000)
    replayed = _run(other, rb.stage, rb.detector, tmp_path / "other.db")
    bench = SimBench(other.sections)
    on_rig = _run(other, bench.stage, bench.detector, tmp_path / "rig.db")
    assert replayed.modes == on_rig.modes
    assert abs(replayed.crossings - on_rig.crossings) <= 2
    assert abs(replayed.modes - truth["modes"]) <= 1
    est = replayed.estimate()
    # Spacing against the simulator's truth (least-squares slope of its mode centres).
    assert est["spacing_steps"] == pytest.approx(truth["spacing_steps"], rel=0.005)
    # The backlash the counter sees on the replayed mount is the simulator's dead band.
    assert est["backlash_steps"] == pytest.approx(35.0, abs=2.0)


def test_dead_band_after_a_reversal():
    """Up at s = x, down at s = x - b; in the dead band the mount has not moved."""
    pos = np.arange(0, 101, dtype=float)
    up = Recording(pos, pos * 1.0, np.zeros(pos.size))            # value = mechanical position
    down = Recording(pos, pos + 10.0, np.zeros(pos.size))         # b = 10: down at s sees x = s + 10
    rb = ReplayBench({1: up, -1: down}, 10.0, "t.db")
    rb.stage.move_to(50)
    assert rb.detector.read().value == 50.0
    rb.stage.move_to(45)                 # within the dead band: still at x = 50
    assert rb.detector.read().value == 50.0
    assert rb.stage.position_steps() == 45
    rb.stage.move_to(30)                 # play taken up: x = 40
    assert rb.detector.read().value == 40.0
    rb.stage.move_to(35)                 # back up, in the band again
    assert rb.detector.read().value == 40.0

    coarse = np.arange(0, 101, 4, dtype=float)             # recorded every 4 steps
    rb = ReplayBench({1: Recording(coarse, 3 * coarse, np.zeros(coarse.size))}, 0.0, "t.db")
    rb.stage.move_to(50)                 # between recorded points: linear interpolation
    assert rb.detector.read().value == pytest.approx(150.0)


def test_one_direction_serves_both_ways():
    pos = np.arange(0, 51, dtype=float)
    rb = ReplayBench({1: Recording(pos, 2 * pos, np.zeros(pos.size))}, 0.0, "t.db")
    rb.stage.move_to(40)
    rb.stage.move_to(20)
    assert rb.detector.read().value == 40.0


def test_limits_and_the_recorded_range():
    pos = np.arange(100, 201, dtype=float)
    rb = ReplayBench({1: Recording(pos, pos, np.zeros(pos.size))}, 0.0, "t.db", min_steps=0, max_steps=300)
    with pytest.raises(LimitError, match="max_steps = 300"):
        rb.stage.move_to(301)
    with pytest.raises(DeviceError, match="read before"):
        rb.detector.read()
    rb.stage.move_to(250)                 # allowed by the limits, but never recorded
    with pytest.raises(DeviceError, match=r"covers 100\.\.200"):
        rb.detector.read()


def test_bad_logs_and_keys(tmp_path):
    p = tmp_path / "x.db"
    p.write_bytes(b"not a database at all")
    with pytest.raises(DeviceError, match="not a modetick run log"):
        bench_from_log(p)
    assert check_replay_settings({"log": str(tmp_path / "missing.db")})[0][0] == "log"
    assert check_replay_settings({"log": str(p), "backlash_steps": -1.0})[0][0] == "backlash_steps"
    assert schedule.recorded_count(load_rig(None, BACKLASH)["sweep"]) == 8001


def test_rig_file_with_replay_drivers_runs_through_the_registry(live, tmp_path, monkeypatch):
    """`[stage] driver = "replay"`, `[detector] driver = "replay"`, `log = ...`: loader, registry, engine.

    The entries are the ones drivers/registry.py is to carry; added here only
    if it does not have them yet.
    """
    from daq.rig import parse_rig
    from drivers import registry
    from sims import replay_detector as rd
    monkeypatch.setitem(registry.STAGE_DRIVERS, "replay", registry.STAGE_DRIVERS.get(
        "replay", registry.DriverEntry(rd.REPLAY_STAGE_KEYS, rd.open_replay_stage)))
    monkeypatch.setitem(registry.DETECTOR_DRIVERS, "replay", registry.DETECTOR_DRIVERS.get(
        "replay", registry.DriverEntry(rd.REPLAY_DETECTOR_KEYS, rd.open_replay_detector,
                                       rd.check_replay_settings)))
    _, path, counter_live, truth = live
    text = (f'[stage]\ndriver = "replay"\nmin_steps = 0\nmax_steps = 20000\n'
            f'[detector]\ndriver = "replay"\nlog = "{path}"\n'
            f'[sweep]\nstart = 1000\nstop = 5000\nstep = 1\npasses = 2\n')
    rig = parse_rig(text, "replay.toml")
    stage, detector, bench = registry.open_devices(rig.sections)
    assert bench is None and stage.identify() == detector.identify()
    counter = _run(rig, stage, detector, tmp_path / "via_rig.db")
    assert counter.modes == counter_live.modes
    # A log that is not there is a rig-file error, caught by the loader before anything opens.
    from daq.rig import RigError
    with pytest.raises(RigError, match="no such file"):
        parse_rig(text.replace(str(path), str(tmp_path / "gone.db")), "replay.toml")
