"""Continuous scan mode on the simulated rig: constant speed, positions from reports and the clock."""
import json
import subprocess
import sys
from pathlib import Path

from daq.runlog import RunLog

ROOT = Path(__file__).resolve().parent.parent


def test_scan_counts_the_modes_of_the_simulated_chip(tmp_path):
    log = tmp_path / "scan.db"
    r = subprocess.run([sys.executable, "-m", "daq", "sweep", "--log", str(log), "--json",
                        "--set", 'sweep.mode="scan"', "--set", "sweep.speed_steps_per_s=1000"],
                       cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    s = json.loads(r.stdout)
    truth = s["truth"]
    assert abs(s["modes"] - truth["modes"]) <= 1
    assert abs(s["spacing_steps"] / truth["spacing_steps"] - 1) < 0.005
    samples = RunLog.open(log).read_samples()
    # One sample per step position reached, both directions, inside the sweep range.
    assert samples.position_steps.min() >= 1000 and samples.position_steps.max() <= 5000
    assert set(samples.direction.tolist()) == {1, -1}
    # both passes covered the range; how densely depends on the machine's load (8000 steps
    # read on an idle machine, 3200 beside two CPU hogs)
    assert samples.position_steps.min() <= 1010 and samples.position_steps.max() >= 4990
    assert len(samples) > 2000


def test_scan_needs_a_speed():
    r = subprocess.run([sys.executable, "-m", "daq", "sweep", "--set", 'sweep.mode="scan"'],
                       cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "speed_steps_per_s" in r.stderr
