"""Done-when of the simulator: the live count of the default simulated sweep agrees with the truth.

For every built-in scenario the counter is meant to handle, the default rig
(configs/sim.toml, seed 7) is swept step by step through SimBench in the
engine's schedule, the readings go to analysis.counter.StreamCounter in
chunks as the engine flushes them, and the count must match the simulator's
truth within one mode, the spacing within 0.5 %.
"""
from __future__ import annotations

import numpy as np
import pytest

from analysis.counter import StreamCounter
from daq import schedule
from daq.rig import load_rig
from sims.instruments import SimBench
from sims.scenarios import SCENARIOS

CHUNK = 4096  # the engine's FLUSH_SAMPLES


def live_count(overrides: list[str]) -> tuple[StreamCounter, dict]:
    rig = load_rig(None, overrides)
    bench = SimBench(rig.sections)
    counter = StreamCounter(rig["counter"])
    pos, dirs, vals = [], [], []
    for mv in schedule.moves(rig["sweep"]):
        bench.stage.move_to(mv.target_steps)
        if not mv.record:
            continue
        pos.append(mv.target_steps)
        dirs.append(mv.direction)
        vals.append(bench.detector.read().value)
        if len(vals) == CHUNK:
            counter.feed(np.array(pos), np.array(dirs), np.array(vals))
            pos, dirs, vals = [], [], []
    counter.feed(np.array(pos), np.array(dirs), np.array(vals))
    counter.finish()
    return counter, bench.truth()


@pytest.mark.parametrize("name", [n for n, sc in SCENARIOS.items() if sc["countable"]])
def test_live_count_matches_truth(name):
    counter, truth = live_count([f'sim.scenario="{name}"'])
    est = counter.estimate()
    assert abs(counter.modes - truth["modes"]) <= 1, (counter.modes, truth["modes"])
    assert est["spacing_steps"] == pytest.approx(truth["spacing_steps"], rel=0.005)


def test_live_chip_length_holds_through_the_first_pass():
    # The live spacing is the fit's at the middle of the modes seen so far, which moves
    # along the first pass (the spacing in steps changes across a sweep: Littrow tuning
    # goes as cos(theta)); converted there, the live chip length stays the simulator's
    # true length (scaled by its true group index over the rig's, which the analysis uses)
    # from early in the first pass on.
    from analysis.counter import StreamCounter
    from analysis.physics import live_calibration
    from daq.rig import load_rig
    from sims.instruments import SimBench
    from sims.trace import simulate_trace
    rig = load_rig(None)
    truth = SimBench(rig.sections).truth()
    want = truth["length_um"] * truth["group_index"] / rig["chip"]["group_index"]
    tr = simulate_trace(rig.sections)
    c = StreamCounter(rig["counter"])
    seen = []
    for a in range(0, tr.value.size, 256):
        c.feed(tr.position_steps[a:a + 256], tr.direction[a:a + 256], tr.value[a:a + 256])
        e = c.estimate()
        if e["modes"] >= 20 and e["spacing_steps"]:
            cal = live_calibration(e["spacing_steps"], e["spacing_steps_u"], rig.sections, e["centre_steps"],
                                   e["backlash_steps"])
            seen.append(cal["length_um"])
    assert len(seen) > 10
    assert max(abs(L / want - 1) for L in seen) < 0.001     # converted at mid-sweep: up to 1 % off


@pytest.mark.parametrize("seed", [1, 2])
@pytest.mark.parametrize("scenario", ["clean", "noisy", "backlash", "kicks", "split", "drift", "clipped",
                                      "narrowgain", "lever", "rough"])
def test_spacing_uncertainty_is_honest_against_the_simulators_truth(scenario, seed):
    # The stated standard uncertainty against the simulator's true mode centres: the true
    # local spacing at the fit's centre (the slope of a quadratic through the eleven true
    # centres around it, numpy's polyfit; the true centres are those of the mount moving
    # up, so the place is the fit's mechanical centre plus half the backlash) lies within
    # 3 u; under drift, whose u rests on the scatter of two passes (one degree of
    # freedom), within the stated 95 % expanded uncertainty k95 * u (Student's t).
    from analysis.pipeline import analyze_trace
    from daq.rig import load_rig
    from sims.instruments import SimBench
    from sims.trace import simulate_trace
    rig = load_rig(None, [f'sim.scenario="{scenario}"', f"sim.seed={seed}", "sweep.passes=2"])
    tr = simulate_trace(rig.sections)
    truth = SimBench(rig.sections).truth()
    r = analyze_trace(tr.position_steps, tr.value, tr.direction, tr.pass_index, rig.sections, rig["counter"])
    c = np.asarray(truth["mode_centres_steps"])
    at = r["fit"]["centre_steps"] + 0.5 * (r["backlash_steps"] or 0.0)
    m = int(np.clip(np.searchsorted(c, at), 5, c.size - 6))
    coef = np.polyfit(c[m - 5:m + 6] - at, np.arange(-5.0, 6.0), 2)   # mode number against position
    local = 1.0 / coef[-2]                                            # steps per mode at `at`
    k = r["spacing_steps_k95"] if scenario == "drift" else 3.0
    assert abs(r["spacing_steps"] - local) <= k * r["spacing_steps_u"]


@pytest.mark.parametrize("moving", ["up", "down"])
def test_mode_wavelengths_hold_for_the_direction_the_stage_was_calibrated_in(moving):
    # The simulated mount reads true moving up, and reads b (its 35-step dead band) low
    # moving down (sims/mechanics.py): a calibration taken moving down has the angle
    # offset k b larger (grating angle = angle_at_zero_deg + deg_per_step * steps, then
    # Palmer's Littrow equation). Either way each mode's wavelength in the map is the one the
    # simulator's true centre gives, to a small fraction of a mode spacing.
    from analysis import physics
    from analysis.pipeline import analyze_trace
    rig0 = load_rig(None, ['sim.scenario="backlash"', "sim.seed=1", "sweep.passes=2"])
    st = rig0["stage"]
    truth = SimBench(rig0.sections).truth()
    b = 35.0                                   # the scenario's dead band (sims/scenarios.py)
    a0 = st["angle_at_zero_deg"] + (st["deg_per_step"] * b if moving == "down" else 0.0)
    rig = load_rig(None, ['sim.scenario="backlash"', "sim.seed=1", "sweep.passes=2",
                          f'stage.calibrated_moving="{moving}"', f"stage.angle_at_zero_deg={a0!r}",
                          f"sim.true_angle_at_zero_deg={st['angle_at_zero_deg']!r}"])
    from sims.trace import simulate_trace
    tr = simulate_trace(rig.sections)
    r = analyze_trace(tr.position_steps, tr.value, tr.direction, tr.pass_index, rig.sections, rig["counter"])
    assert r["backlash_steps"] == pytest.approx(b, abs=1.0)
    c = np.asarray(truth["mode_centres_steps"])
    lam_true = physics.littrow_wavelength_nm(st["angle_at_zero_deg"] + st["deg_per_step"] * c,
                                             rig["grating"]["lines_per_mm"])
    spacing_nm = truth["spacing_nm"]
    for row in r["mode_map"]:
        j = int(np.argmin(np.abs(c - row["centre_steps"])))
        assert abs(row["wavelength_nm"] - lam_true[j]) < 0.05 * spacing_nm


def test_a_one_way_map_against_the_other_ways_calibration_is_flagged():
    from analysis.pipeline import analyze_trace
    from sims.trace import simulate_trace
    said = {}
    for moving in ("up", "down"):
        rig = load_rig(None, ['sim.scenario="backlash"', "sweep.passes=1", f'stage.calibrated_moving="{moving}"'])
        tr = simulate_trace(rig.sections)
        r = analyze_trace(tr.position_steps, tr.value, tr.direction, tr.pass_index, rig.sections, rig["counter"])
        said[moving] = any("calibrated_moving" in n for n in r["notes"])
    assert said == {"up": False, "down": True}
