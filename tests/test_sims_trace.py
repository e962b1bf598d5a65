"""The vectorized trace against the step-by-step bench, the engine's schedule, the truth, the CLI."""
from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from daq import schedule
from daq.rig import load_rig
from daq.runlog import RunLog
from sims.instruments import SimBench
from sims.scenarios import SCENARIOS
from sims.trace import sample_times_s, simulate_trace, sweep_schedule

REPO = Path(__file__).resolve().parent.parent


def bench_sweep(sections) -> tuple[np.ndarray, np.ndarray]:
    """Drive a SimBench through the engine's own schedule, as the engine does."""
    b = SimBench(sections)
    pos, val = [], []
    for mv in schedule.moves(sections["sweep"]):
        b.stage.move_to(mv.target_steps)
        if mv.record:
            pos.append(mv.target_steps)
            val.append(b.detector.read().value)
    return np.array(pos), np.array(val)


@pytest.mark.parametrize("name", [n for n in SCENARIOS if n != "camera"])
def test_trace_equals_step_by_step_bench(name):
    sections = load_rig(None, [f'sim.scenario="{name}"', "sweep.start=1800", "sweep.stop=2600",
                               "sweep.passes=3"]).sections
    pos, val = bench_sweep(sections)
    tr = simulate_trace(sections)
    assert np.array_equal(tr.position_steps, pos)
    assert np.allclose(tr.value, val, rtol=0, atol=1e-12)


def test_trace_equals_bench_with_overshoot_averaging_and_camera():
    sections = load_rig(None, ['sim.scenario="kicks"', "sweep.start=2000", "sweep.stop=2500",
                               "sweep.step=2", "sweep.passes=3", "sweep.overshoot_steps=40",
                               "detector.reads_per_step=3"]).sections
    pos, val = bench_sweep(sections)
    tr = simulate_trace(sections)
    assert np.array_equal(tr.position_steps, pos)
    assert np.allclose(tr.value, val, rtol=0, atol=1e-12)
    cam = load_rig(None, ['sim.scenario="camera"', "sweep.start=3000", "sweep.stop=3100"]).sections
    pos, val = bench_sweep(cam)
    tr = simulate_trace(cam)
    assert np.array_equal(tr.value, val)


@settings(max_examples=40, deadline=None)
@given(start=st.integers(0, 400), span=st.integers(-300, 300).filter(lambda s: s != 0),
       step=st.integers(1, 7), passes=st.integers(1, 4), over=st.sampled_from([0, 5, 30]))
def test_schedule_is_the_engine_schedule(start, span, step, passes, over):
    sweep = {"start": start, "stop": start + span, "step": step, "passes": passes, "overshoot_steps": over}
    recorded = [m for m in schedule.moves(sweep) if m.record]
    pos, direction, pass_index, starts = sweep_schedule(sweep)
    assert pos.tolist() == [m.target_steps for m in recorded]
    assert direction.tolist() == [m.direction for m in recorded]
    assert pass_index.tolist() == [m.pass_index for m in recorded]
    assert starts == [i for i, m in enumerate(recorded) if i == 0 or m.pass_index != recorded[i - 1].pass_index]


def test_n_samples_keeps_alternating_passes():
    sections = load_rig(None).sections
    tr = simulate_trace(sections, n_samples=20000)
    assert tr.value.size == 20000
    assert tr.pass_index.max() == 4 and set(np.unique(tr.direction)) == {-1, 1}
    first = simulate_trace(sections)  # the configured two passes are its beginning
    assert np.array_equal(tr.value[:first.value.size], first.value)
    t = sample_times_s(SimBench(sections).model, 3)
    assert t.tolist() == pytest.approx([0.0, 0.002, 0.004])  # max(settle_s, read_time_s) per read


def test_truth_rule():
    sections = load_rig(None).sections
    t = SimBench(sections).truth()
    centres = np.array(t["mode_centres_steps"])
    assert t["modes"] == len(centres) == len(t["mode_orders"])
    assert np.all(np.diff(t["mode_orders"]) == -1)  # consecutive chip modes, order falling with angle
    # Every counted centre lies inside the swept range by at least half a blip width.
    assert centres.min() >= 1000 + t["blip_fwhm_steps"] * 0.45
    assert centres.max() <= 5000 - t["blip_fwhm_steps"] * 0.45
    # Spacing: steps x tuning rate = lambda^2 / (2 n_g L)  (Saleh & Teich)
    lam = t["wavelength_nm"]
    assert t["spacing_nm"] == pytest.approx(lam ** 2 / (2 * t["group_index"] * t["length_um"] * 1e3), rel=1e-12)
    assert t["spacing_steps"] * t["tuning_nm_per_step"] == pytest.approx(t["spacing_nm"], rel=2e-3)
    # Chip length back from the count: L = N lambda^2 / (2 n_g W) (from delta_lambda = lambda^2/(2 n_g L), Saleh & Teich).
    w_nm = (t["modes"] - 1) * t["spacing_steps"] * t["tuning_nm_per_step"]
    assert (t["modes"] - 1) * lam ** 2 / (2 * t["group_index"] * w_nm) / 1e3 == pytest.approx(797.02, rel=3e-3)
    # Undetectable modes are left out: below-threshold blips outside a narrow lasing range.
    narrow = SimBench(load_rig(None, ['sim.scenario="narrowgain"']).sections).truth()
    assert narrow["modes"] < narrow["modes_crossed"] == t["modes_crossed"]
    # Raising detect_k far above the blips makes nothing detectable.
    none = SimBench(load_rig(None, ["sim.detect_k=1e6"]).sections).truth()
    assert none["modes"] == 0 and none["modes_crossed"] == t["modes_crossed"]


def run_cli(*args, cwd=REPO):
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(REPO), os.environ.get("PYTHONPATH")])))
    return subprocess.run([sys.executable, "-m", "daq", "simulate", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=120)


def test_cli_writes_csv_log_and_truth(tmp_path):
    out = tmp_path / "trace.csv"
    r = run_cli("--out", str(out), "--set", 'sim.scenario="backlash"', "--set", "sim.seed=3")
    assert r.returncode == 0, r.stderr
    assert "scenario backlash, seed 3" in r.stdout
    with open(out, newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0]) == ["position", "intensity", "direction", "pass", "time_s"]
    sweep = load_rig(None).sections["sweep"]
    assert len(rows) == schedule.recorded_count(sweep)
    sections = load_rig(None, ['sim.scenario="backlash"', "sim.seed=3"]).sections
    tr = simulate_trace(sections)
    assert [float(x["intensity"]) for x in rows[:50]] == tr.value[:50].tolist()  # exact round trip
    assert rows[-1]["pass"] == "1" and rows[-1]["direction"] == "-1"

    r = run_cli("--json", "--set", 'sim.scenario="split"')
    assert r.returncode == 0, r.stderr
    truth = json.loads(r.stdout)
    for key in ("modes", "spacing_steps", "spacing_nm", "length_um", "group_index", "wavelength_nm",
                "mode_centres_steps"):
        assert key in truth
    assert truth["scenario"] == "split"

    db = tmp_path / "run.db"
    r = run_cli("--out", str(db), "--samples", "12000")
    assert r.returncode == 0, r.stderr
    log = RunLog.open(db)
    assert log.n_samples == 12000 and log.meta("status") == "finished"
    s = log.read_samples()
    assert s.t_s[1] == pytest.approx(0.002)
    assert log.summary()["truth"]["modes"] == SimBench(load_rig(None).sections).truth()["modes"]
    log.close()


def test_cli_rejects_bad_input(tmp_path):
    r = run_cli("--set", 'sim.scenario="nope"')
    assert r.returncode == 2 and "unknown scenario 'nope'" in r.stderr and "kicks" in r.stderr
    r = run_cli("--samples", "0")
    assert r.returncode == 2
    r = run_cli("--list")
    assert r.returncode == 0 and all(name in r.stdout for name in SCENARIOS)
