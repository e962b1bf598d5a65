"""``modetick park`` on the simulated rig, checked against the simulator's truth (not the map)."""
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from daq.cmd_park import approach
from daq.rig import load_rig
from drivers.base import LimitError
from sims.instruments import SimBench

ROOT = Path(__file__).resolve().parent.parent
ENV = {**os.environ, "PYTHONPATH": str(ROOT)}
RIG = ROOT / "configs" / "sim.toml"
# The simulator's "backlash" scenario: a 35-step dead band (sims/scenarios.py).
BACKLASH = ["sweep.settle_s=0", 'sim.scenario="backlash"']
DEAD_BAND = 35.0


def _cli(*args):
    return subprocess.run([sys.executable, "-m", "daq", *map(str, args)], cwd=ROOT, env=ENV,
                          capture_output=True, text=True, timeout=60)


def _sets(overrides):
    return [a for s in overrides for a in ("--set", s)]


@pytest.fixture(scope="module")
def mapped(tmp_path_factory):
    """A two-pass sweep (up, then down) of the rig with heavy backlash, and the map it made."""
    path = tmp_path_factory.mktemp("park") / "map.db"
    res = _cli("sweep", "--log", path, "--json", *_sets(BACKLASH))
    assert res.returncode == 0, res.stderr
    modes = json.loads(_cli("modes", path, "--json").stdout)
    truth = SimBench(load_rig(None, BACKLASH).sections).truth()
    return path, modes, truth


def _park(path, mode, *extra):
    res = _cli("park", path, "--mode", mode, "--config", RIG, "--json", *_sets(BACKLASH), *extra)
    return res, (json.loads(res.stdout) if res.stdout.strip() else None)


def test_park_lands_on_the_requested_mode(mapped):
    path, modes, truth = mapped
    centres = np.asarray(truth["mode_centres_steps"])     # ideal mount moving up
    half_width = truth["blip_fwhm_steps"] / 2
    res, out = _park(path, 5)
    assert res.returncode == 0, res.stderr
    assert out["direction"] == "up" and out["blip_there"] is True
    assert out["takeup_from_steps"] < out["target_steps"]       # came from below, as the map did
    j = int(np.argmin(np.abs(centres - out["position_steps"])))
    # Moving up this mount sits where the screw is: inside the truth blip.
    assert abs(out["position_steps"] - centres[j]) <= half_width
    # The blip is really there: well above the simulated floor, by the simulator's own heights.
    assert out["reading"] - out["recorded_baseline"] > 0.5 * truth["min_blip_height"]


def test_mode_numbers_count_the_chip_modes(mapped):
    """Modes 42 apart in the map land on truth modes 42 apart (in process, on the simulated mount)."""
    path, modes, truth = mapped
    centres = np.asarray(truth["mode_centres_steps"])
    rig = load_rig(None, BACKLASH)
    bench = SimBench(rig.sections)
    landed = {}
    for k in (5, 47):
        row = next(r for r in modes["mode_map"] if r["mode"] == k)
        approach(bench.stage, int(round(row["centre_up_steps"])), 1, 80, 0, 20000)
        j = int(np.argmin(np.abs(centres - bench.mount.actual())))
        assert abs(bench.mount.actual() - centres[j]) <= truth["blip_fwhm_steps"] / 2
        landed[k] = j
    assert landed[47] - landed[5] == 42


def test_park_from_above_takes_up_the_backlash(mapped):
    path, modes, truth = mapped
    res, out = _park(path, 20, "--from", "down")
    assert res.returncode == 0, res.stderr
    assert out["direction"] == "down" and out["blip_there"] is True
    assert out["takeup_from_steps"] > out["target_steps"]       # went past above, came down
    centres = np.asarray(truth["mode_centres_steps"])
    # Moving down the mount sits DEAD_BAND above the screw: the screw is that far below the mode.
    j = int(np.argmin(np.abs(centres - (out["position_steps"] + DEAD_BAND))))
    assert abs(out["position_steps"] + DEAD_BAND - centres[j]) <= truth["blip_fwhm_steps"] / 2


def test_approach_puts_the_mount_on_the_mode(mapped):
    """In process: the simulated mount's own position after the approach, against the truth."""
    path, modes, truth = mapped
    row = next(r for r in modes["mode_map"] if r["mode"] == 30)
    target = int(round(row["centre_down_steps"]))
    centres = np.asarray(truth["mode_centres_steps"])
    j = int(np.argmin(np.abs(centres - row["centre_steps"])))
    rig = load_rig(None, BACKLASH)
    bench = SimBench(rig.sections)
    near, warn = approach(bench.stage, target, -1, 80, rig["stage"]["min_steps"], rig["stage"]["max_steps"])
    assert near == target + 80 and warn is None
    assert abs(bench.mount.actual() - centres[j]) <= truth["blip_fwhm_steps"] / 2
    # Without the take-up (arriving from below), the same target misses by the dead band.
    bench2 = SimBench(rig.sections)
    bench2.stage.move_to(target)
    assert abs(bench2.mount.actual() - centres[j]) > DEAD_BAND - truth["blip_fwhm_steps"]


def test_takeup_is_shortened_at_a_soft_limit():
    rig = load_rig(None, BACKLASH)
    bench = SimBench(rig.sections)
    near, warn = approach(bench.stage, 1016, 1, 50, 1000, 20000)
    assert near == 1000 and "shortens the take-up to 16 steps" in warn
    assert bench.stage.position_steps() == 1016


def test_target_outside_the_soft_limits_moves_nothing(mapped):
    path, modes, _ = mapped
    res, out = _park(path, 40, "--set", "sweep.stop=2000", "--set", "stage.max_steps=2100")
    assert res.returncode == 2 and out is None
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "outside the soft limits" in lines[0]
    rig = load_rig(None, BACKLASH)
    with pytest.raises(LimitError):   # and the stage itself refuses too
        approach(SimBench(rig.sections).stage, 30000, 1, 50, None, None)


def test_mode_out_of_range_exits_2(mapped):
    res, out = _park(mapped[0], 500)
    assert res.returncode == 2 and out is None
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "mode 500: not in the map" in lines[0]
    assert re.search(r"modes -?\d+\.\.\d+", lines[0])      # says which modes there are


def test_not_a_log_exits_2(tmp_path):
    junk = tmp_path / "x.db"
    junk.write_text("hello")
    res = _cli("park", junk, "--mode", 1, "--config", RIG)
    assert res.returncode == 2 and len(res.stderr.strip().splitlines()) == 1


def test_help_carries_the_laser_safety_line():
    text = _cli("park", "--help").stdout
    assert "eyewear" in text and "laser safety officer" in text
