"""SimBench as the sweep engine sees it: interfaces, limits, mechanics, signal chain, camera."""
from __future__ import annotations

import math
import time

import cv2
import numpy as np
import pytest
from scipy.signal import find_peaks, welch

from daq.rig import RigError, load_rig
from drivers.base import Detector, DeviceError, LimitError, Reading, Stage
from sims.instruments import SimBench
from sims.scenarios import SCENARIOS, SIM_SETTINGS, validate_sim_settings
from sims.signal_chain import NoiseSource

QUIET = ["sim.white_noise_v=0.0", "sim.pink_noise_v=0.0", "sim.adc_bits=24"]


def bench(*overrides) -> SimBench:
    return SimBench(load_rig(None, list(overrides)).sections)


def sweep_values(b: SimBench, positions) -> np.ndarray:
    out = []
    for p in positions:
        b.stage.move_to(int(p))
        out.append(b.detector.read().value)
    return np.array(out)


def test_implements_the_driver_interfaces():
    b = bench()
    assert isinstance(b.stage, Stage) and isinstance(b.detector, Detector)
    assert "scenario clean" in b.stage.identify() and "seed 7" in b.detector.identify()
    r = b.detector.read()
    assert isinstance(r, Reading) and math.isfinite(r.value) and r.spread == 0.0
    b.stage.move_to(1200)
    assert b.stage.position_steps() == 1200 == b.position_steps()
    b.stage.stop()
    b.stage.stop()  # safe repeatedly
    b.stage.close()
    b.detector.close()


def test_soft_limits_refuse_before_moving_and_end_stops_stall():
    b = bench()
    b.move_to(1500)
    with pytest.raises(LimitError):
        b.stage.move_to(20001)  # [stage] max_steps = 20000
    with pytest.raises(LimitError):
        b.stage.move_to(-1)     # [stage] min_steps = 0
    assert b.position_steps() == 1500
    # Without soft limits the mount runs into its end stop: a fault, position at the stop.
    free = bench("sim.travel_max_steps=30000")
    free.min_steps = free.max_steps = None
    with pytest.raises(DeviceError, match="end stop"):
        free.move_to(30500)
    assert free.position_steps() == 30000


def test_rig_without_calibration_is_a_one_line_device_error():
    sections = load_rig(None).sections
    sections["stage"]["deg_per_step"] = None
    with pytest.raises(DeviceError, match="deg_per_step"):
        SimBench(sections)


def test_same_seed_same_readings_whatever_the_pace():
    pos = list(range(1000, 1400)) + list(range(1400, 1000, -1))
    fast = sweep_values(bench("sim.scenario=\"noisy\""), pos)
    slow_bench = bench("sim.scenario=\"noisy\"")
    slow = []
    for i, p in enumerate(pos):
        slow_bench.stage.move_to(p)
        if i % 100 == 0:
            time.sleep(0.01)  # wall-clock pauses must not matter
        slow.append(slow_bench.detector.read().value)
    assert np.array_equal(fast, np.array(slow))
    other = sweep_values(bench("sim.scenario=\"noisy\"", "sim.seed=8"), pos)
    assert not np.array_equal(fast, other)
    assert np.corrcoef(fast, other)[0, 1] > 0.8  # same chip, other noise


def test_backlash_dead_band():
    b = bench("sim.backlash_steps=20.0", *QUIET)
    # On a blip flank, so every step of real motion changes the reading.
    centre = b.truth()["mode_centres_steps"][30]
    start = int(centre) - 4
    sweep_values(b, range(start - 30, start + 1))  # approach upward
    down = sweep_values(b, range(start - 1, start - 40, -1))
    # The first 20 steps down only take up the play: the mount, and the reading, stay put.
    assert np.all(down[:20] == down[0])
    assert np.all(np.diff(down[20:25]) != 0)
    # Then the down sweep sees the blips 20 steps lower than the up sweep (mount at s + b).
    up_b = bench("sim.backlash_steps=20.0", *QUIET)
    xs = np.arange(2000, 2600)
    up = sweep_values(up_b, xs)
    dn = sweep_values(up_b, xs[::-1])[::-1]
    # dn[i] is read at screw position xs[i] with the mount at xs[i] + 20; noise-free, so exactly equal.
    assert np.array_equal(dn[:-40], up[20:-20])


def test_kicks_make_some_blips_appear_twice():
    b = bench("sim.scenario=\"kicks\"", "sim.backlash_steps=0.0", *QUIET)
    xs = np.arange(1000, 5001)
    v = sweep_values(b, xs)
    peaks, _ = find_peaks(v, prominence=0.5)
    truth = b.truth()
    assert len(peaks) >= truth["modes"] + 3  # blips crossed again after a slip back
    # Every extra peak follows a kick site within slip + recovery travel.
    sites = b.model.kick_sites.positions
    centres = np.array(truth["mode_centres_steps"])
    for pk in xs[peaks]:
        if np.abs(centres - pk).min() > 3:
            before = sites[sites <= pk + 1]
            assert before.size and pk - before[-1] < 18 * 1.35 + 30
    # Without kicks: exactly one peak per mode.
    clean = sweep_values(bench(*QUIET), xs)
    assert len(find_peaks(clean, prominence=0.5)[0]) == truth["modes"]


def test_adc_quantizes_and_clips():
    b = bench()
    lsb = 5.0 / 4095  # 12-bit, 5 V full scale ([sim] defaults)
    v = sweep_values(b, range(2000, 2400))
    codes = v / lsb
    assert np.allclose(codes, np.round(codes), atol=1e-6)
    c = bench("sim.scenario=\"clipped\"")
    readings = []
    for p in range(2000, 2400):
        c.stage.move_to(p)
        readings.append(c.detector.read())
    values = np.array([r.value for r in readings])
    assert values.max() == pytest.approx(1.0)  # clipped at full scale
    assert np.allclose(values / (1.0 / 1023), np.round(values / (1.0 / 1023)), atol=1e-6)  # 10-bit
    flagged = np.array([r.aux.get("saturated", 0.0) == 1.0 for r in readings])
    assert np.array_equal(flagged, values >= 1.0 - 1e-12) and flagged.sum() > 20
    low = bench("sim.white_noise_v=0.5")  # noise far below zero volts clips at code 0
    assert sweep_values(low, range(2000, 2400)).min() == 0.0


def test_reads_per_step_average_and_spread():
    b = bench("detector.reads_per_step=4", "sim.white_noise_v=0.05")
    b.move_to(2500)
    r = b.detector.read()
    ref = bench("sim.white_noise_v=0.05")  # the same read stream, one read per call
    ref.move_to(2500)
    four = [ref.read_value() for _ in range(4)]
    assert r.value == pytest.approx(np.mean(four), rel=1e-12)
    assert r.spread == pytest.approx(np.std(four, ddof=1), rel=1e-9)


def test_spikes_are_single_samples():
    xs = range(1000, 5001)
    spiky = sweep_values(bench("sim.scenario=\"noisy\""), xs)
    plain = sweep_values(bench("sim.scenario=\"noisy\"", "sim.spike_prob=0.0"), xs)
    diff = np.abs(spiky - plain) > 1e-9
    assert 2 <= diff.sum() <= 30           # spike_prob 0.002 of 4001 reads
    assert not np.any(diff[1:] & diff[:-1])  # never two in a row
    # 0.5..1.5 x 1.2 V either way, unless the ADC clipped a downward spike at 0 V.
    big = np.abs(spiky - plain)[diff] > 0.6 - 0.002
    assert np.all(big | (spiky[diff] == 0.0))


def test_pink_noise_spectrum_falls_as_one_over_f():
    noise = NoiseSource(3, white_v=0.0, pink_v=1.0, spike_prob=0.0, spike_height_v=0.0)
    pink, _ = noise.take(1 << 19)
    f, psd = welch(pink, fs=1.0, nperseg=1 << 16)  # scipy's Welch estimate as the reference
    band = (f > 1e-4) & (f < 1e-2)
    slope = np.polyfit(np.log10(f[band]), np.log10(psd[band]), 1)[0]
    assert slope == pytest.approx(-1.0, abs=0.25)  # 1/f: a slope of -1 in log-log
    assert np.std(pink) == pytest.approx(1.0, rel=0.5)  # rms near the set level (slow poles wander)


def test_drift_moves_the_baseline_and_the_modes():
    b = bench("sim.scenario=\"drift\"")
    r = b.detector.read()
    assert "temp_offset_K" in r.aux
    t0_reading = b.model.offset_v(0.0)
    t5 = b.model.offset_v(5.0)
    assert abs(t5 - t0_reading) > 0.01
    xs = np.arange(1000, 5001)
    up = sweep_values(b, xs)
    dn = sweep_values(b, xs[::-1])[::-1]
    pu, _ = find_peaks(up, prominence=0.5)
    pd, _ = find_peaks(dn, prominence=0.5)
    # Modes moved with temperature between the passes (no backlash here).
    assert np.abs(np.median(xs[pu][:20]) - np.median(xs[pd][:20])) > 1


def test_camera_frames():
    b = bench("sim.scenario=\"camera\"", "sim.camera_width_px=160", "sim.camera_height_px=120")
    t = b.truth()
    top = int(round(t["mode_centres_steps"][40]))
    b.move_to(top)
    bright = b.render_frame()
    b.move_to(top + 22)  # half a spacing away: between blips
    dim = b.render_frame()
    for f in (bright, dim):
        assert f.dtype == np.uint8 and f.shape == (120, 160)
    assert bright.max() == 255 and dim.max() < 255   # saturating at the blip top only
    # OpenCV's image moments as the reference for the spot: brighter at the blip, centred.
    mb = cv2.moments(cv2.subtract(bright, np.full_like(bright, 30)))
    md = cv2.moments(cv2.subtract(dim, np.full_like(bright, 30)))
    assert mb["m00"] > 3 * md["m00"]
    assert mb["m10"] / mb["m00"] == pytest.approx(79.5, abs=3)
    assert mb["m01"] / mb["m00"] == pytest.approx(59.5, abs=1)
    # The zeroth-order beam turns with the grating: the spot walks 6 px/deg across the frame.
    b.move_to(1000)
    left = cv2.moments(cv2.subtract(b.render_frame(), np.full_like(bright, 30)))
    b.move_to(5000)
    right = cv2.moments(cv2.subtract(b.render_frame(), np.full_like(bright, 30)))
    walk = right["m10"] / right["m00"] - left["m10"] / left["m00"]
    assert walk == pytest.approx(6.0 * 0.8, abs=0.6)
    # The detector reduces the frames: ROI sum follows the output, saturation is flagged.
    b.move_to(top)
    r_top = b.detector.read()
    b.move_to(top + 22)
    r_low = b.detector.read()
    assert r_top.value > 2 * r_low.value and r_top.aux.get("saturated") == 1.0
    assert "saturated" not in r_low.aux
    # A meter rig renders frames too, at the size its [sim] asks.
    m = bench("sim.camera_width_px=64", "sim.camera_height_px=48")
    assert m.render_frame().shape == (48, 64)


def test_sim_settings_schema_and_validation():
    assert SIM_SETTINGS["scenario"] == "clean" and "seed" in SIM_SETTINGS
    assert validate_sim_settings({"scenario": "clean", "seed": 1}) == []
    errs = validate_sim_settings({"scenario": "tuesday"})
    assert errs and errs[0][0] == "scenario"
    for name in SCENARIOS:
        assert name in errs[0][1]
    bad = {"scenario": "clean", "facet_reflectance": 1.2, "adc_bits": 40, "group_index": 3.0,
           "lever_arm": "bent", "white_noise_v": -1.0}
    keys = {k for k, _ in validate_sim_settings(bad)}
    assert keys == {"facet_reflectance", "adc_bits", "group_index", "lever_arm", "white_noise_v"}
    for name in SCENARIOS:
        assert validate_sim_settings({"scenario": name}) == [], name
    with pytest.raises(RigError, match=r"\[sim\] scenario: unknown scenario 'x'.*clean"):
        load_rig(None, ['sim.scenario="x"'])
    with pytest.raises(RigError, match=r"\[sim\] ext_contrast"):
        load_rig(None, ["sim.ext_contrast=2.0"])
    with pytest.raises(RigError, match="unknown key"):
        load_rig(None, ["sim.chip_lenght_um=800.0"])


@pytest.mark.parametrize("name", list(SCENARIOS))
def test_every_scenario_builds_and_has_detectable_modes(name):
    b = bench(f'sim.scenario="{name}"')
    t = b.truth()
    assert 50 <= t["modes"] <= t["modes_crossed"] <= 100
    assert t["spacing_steps"] == pytest.approx(45.6, rel=0.02)
    b.move_to(2000)
    assert math.isfinite(b.detector.read().value)
