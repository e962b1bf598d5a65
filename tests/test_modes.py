"""``modetick modes``: the mode map against the simulator's truth, the grating equation, and CSV."""
import csv
import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from daq.cmd_modes import COLUMNS, load_mode_map, read_csv, write_csv
from daq.rig import load_rig
from daq.runlog import RunLog
from sims.instruments import SimBench

ROOT = Path(__file__).resolve().parent.parent
ENV = {**os.environ, "PYTHONPATH": str(ROOT)}
SWEEP = ["sweep.settle_s=0"]


def _cli(*args):
    return subprocess.run([sys.executable, "-m", "daq", *map(str, args)], cwd=ROOT, env=ENV,
                          capture_output=True, text=True, timeout=60)


@pytest.fixture(scope="module")
def logged(tmp_path_factory):
    path = tmp_path_factory.mktemp("modes") / "run.db"
    res = _cli("sweep", "--log", path, "--json", *[a for s in SWEEP for a in ("--set", s)])
    assert res.returncode == 0, res.stderr
    truth = SimBench(load_rig(None, SWEEP).sections).truth()
    return path, json.loads(res.stdout), truth


def _map(path, *extra):
    res = _cli("modes", path, "--json", *extra)
    assert res.returncode == 0, res.stderr
    return json.loads(res.stdout)


@pytest.fixture(scope="module")
def listed(logged, tmp_path_factory):
    """The map as JSON on stdout and as CSV, from one run of the command."""
    csv_path = tmp_path_factory.mktemp("csv") / "modes.csv"
    return _map(logged[0], "--csv", csv_path), csv_path


def test_every_mode_with_centres_heights_widths(logged, listed):
    path, summary, truth = logged
    m = listed[0]
    rows = m["mode_map"]
    assert m["modes"] == len(rows) == summary["modes"]
    assert [r["mode"] for r in rows] == sorted(r["mode"] for r in rows)
    centres = truth["mode_centres_steps"]   # the simulator's ideal mount, moving up
    for r in rows:
        nearest = min(centres, key=lambda c: abs(c - r["centre_up_steps"]))
        assert abs(r["centre_up_steps"] - nearest) < 1.0
        # This mount has no play: the two directions put a mode at the same place.
        assert abs(r["centre_down_steps"] - r["centre_up_steps"]) < 1.0
        assert r["height"] >= 0.8 * truth["min_blip_height"]
        assert r["width_steps"] == pytest.approx(truth["blip_fwhm_steps"], rel=0.35)


def test_wavelengths_follow_the_grating_equation(logged, listed):
    path, _, truth = logged
    rows = listed[0]["mode_map"]
    st = load_rig(None, SWEEP)
    k, a0 = st["stage"]["deg_per_step"], st["stage"]["angle_at_zero_deg"]
    d_nm = 1e6 / st["grating"]["lines_per_mm"]
    # the rig is calibrated moving up: the reading moving up is the mechanical centre plus
    # half the backlash
    half_b = 0.5 * (listed[0]["backlash_steps"] or 0.0)
    for r in rows:
        # Littrow: m lambda = 2 d sin(theta) (Palmer, Diffraction Grating Handbook), order 1.
        lam = 2 * d_nm * math.sin(math.radians(a0 + k * (r["centre_steps"] + half_b)))
        assert r["wavelength_nm"] == pytest.approx(lam, abs=1e-6)
    # Neighbouring modes are one free spectral range apart: lambda^2 / (2 n_g L)
    # (Saleh & Teich), which the simulator computes from its own chip.
    lams = [r["wavelength_nm"] for r in rows]
    gaps = [b - a for a, b in zip(lams, lams[1:])]
    assert sum(gaps) / len(gaps) == pytest.approx(truth["spacing_nm"], rel=0.02)


def test_csv_round_trip(listed):
    m, out = listed
    header = out.read_text().splitlines()[0].split(",")
    assert tuple(header) == COLUMNS
    back = read_csv(out)
    assert back == m["mode_map"]       # every float back bit for bit
    with open(out, newline="") as fh:  # and readable by any CSV reader
        assert len(list(csv.reader(fh))) == len(back) + 1


def test_uncalibrated_rig_has_no_wavelengths(tmp_path):
    """In process: a live run of the engine on a rig whose actuator was never calibrated."""
    from analysis.counter import StreamCounter
    from daq.engine import Engine, LiveState
    from daq.rig import parse_rig
    from daq.summary import build_summary
    rig = parse_rig(
        "[stage]\ndriver = \"sim\"\nmin_steps = 0\nmax_steps = 20000\n"
        "[sweep]\nstart = 1000\nstop = 2000\nstep = 1\npasses = 1\n"
        "[grating]\nlines_per_mm = 1500.0\n"
        "[sim]\ntrue_deg_per_step = 2.0e-4\ntrue_angle_at_zero_deg = 44.0\n", "nocal.toml")
    bench = SimBench(rig.sections)
    log = RunLog.create(tmp_path / "nocal.db", rig)
    counter = StreamCounter(rig["counter"])
    engine = Engine(rig, bench.stage, bench.detector, counter, log, LiveState())
    engine.run()
    engine.finish_counting()
    log.finish("finished", build_summary(log, rig.sections, "finished", counter=counter))
    m = load_mode_map(log)
    assert m.calibrated is False and len(m.rows) > 10
    assert all(r.wavelength_nm is None for r in m.rows)
    write_csv(m, tmp_path / "nocal.csv")
    assert all(r["wavelength_nm"] is None for r in read_csv(tmp_path / "nocal.csv"))


def test_a_log_without_summary_is_analysed(tmp_path):
    """A run killed before its summary: the map comes from the offline analysis of its samples."""
    from sims.trace import simulate_trace
    rig = load_rig(None, SWEEP + ["sweep.passes=1"])
    tr = simulate_trace(rig.sections)
    log = RunLog.create(tmp_path / "killed.db", rig)
    log.append_samples(np.arange(tr.value.size) * 1e-3, tr.position_steps, tr.direction, tr.pass_index, tr.value)
    m = load_mode_map(log)
    assert m.source == "analysed now" and m.direction == 1
    truth = SimBench(rig.sections).truth()
    assert abs(len(m.rows) - truth["modes"]) <= 1


def test_table_view(logged):
    text = _cli("modes", logged[0]).stdout
    assert "centre up" in text and "wavelength" in text and "map made moving up" in text


def test_not_a_log_exits_2_with_one_line(tmp_path):
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"\x00" * 100)
    res = _cli("modes", junk)
    assert res.returncode == 2
    assert len(res.stderr.strip().splitlines()) == 1 and "not a modetick run log" in res.stderr
