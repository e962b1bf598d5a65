"""gcode stage through real pyserial against the G-code controller emulator on a pty.

Words checked against their meaning in the NIST RS274NGC interpreter spec
(NISTIR 6556, v3): G90 absolute / G91 incremental distance mode, G1 linear
move at feed rate F (units per minute), G4 dwell (P seconds).
"""
from __future__ import annotations

import re
import time

import pytest

from drivers.base import DeviceError, LimitError
from drivers.registry import STAGE_DRIVERS
from sims.emulators import start_gcode_machine
from tests.test_drivers_support import REPLY_S, comb, one_line, sections, wait_for  # noqa: F401

UNITS_PER_STEP = 0.000625   # degrees per step of the example rotation stage

from daq.rig import RigError  # noqa: E402

# A bad setting is refused by the rig loader (RigError) or, for what only the
# device can tell (a file that is not there, a frame size), when it opens.
BAD_SETTING = (RigError, DeviceError)


def gcode_keys(port_path: str, **overrides) -> dict:
    keys = dict(driver="gcode", port=port_path, units_per_step=UNITS_PER_STEP, feed_per_min=600.0,
                stop_command="M410", timeout_s=REPLY_S, backoff_s=0.01, move_timeout_s=5.0)
    keys.update(overrides)
    return keys


def open_stage(keys: dict):
    s = sections(keys)
    return STAGE_DRIVERS["gcode"].factory(s, None)


@pytest.fixture
def machine(comb):
    raw, physics = comb
    port, m = start_gcode_machine(physics, UNITS_PER_STEP)
    yield port, m, raw
    port.close()


@pytest.mark.parametrize("positioning", ["absolute", "relative"])
def test_moves_in_axis_units_with_ok_handshake(machine, positioning):
    port, m, raw = machine
    stage = open_stage(gcode_keys(port.path, positioning=positioning, feed_per_min=6000.0))
    try:
        assert port.received[0] == ("G90" if positioning == "absolute" else "G91")
        for target in (160, 161, 240, 200, 200, 120):
            stage.move_to(target)
            assert raw.steps == target and stage.position_steps() == target
        moves = [line for line in port.received if line.startswith("G1 ")]
        # Every move is "G1 X<units> F<feed>", units = steps x units_per_step (4 decimals).
        assert all(re.fullmatch(r"G1 X-?\d+\.\d{4} F6000", line) for line in moves)
        if positioning == "absolute":
            assert "G1 X0.1500 F6000" in moves        # 240 steps x 0.000625 deg
        else:
            assert "G1 X-0.0250 F6000" in moves       # 240 -> 200: 40 steps back
        assert stage.position_steps() == 120
    finally:
        stage.close()


def test_move_returns_only_when_motion_is_done(machine):
    port, m, raw = machine
    # 100 steps = 0.0625 deg at F3.75 deg/min takes 1 s of motion: G4 P0's ok waits for it.
    stage = open_stage(gcode_keys(port.path, feed_per_min=3.75 * 2))
    try:
        stage.move_to(100)
        t0 = time.monotonic()
        stage.move_to(150)                            # 50 steps at 7.5 deg/min: 0.25 s
        elapsed = time.monotonic() - t0
        # upper bound, generous for a loaded machine: no reply timeout (REPLY_S) waited out
        assert raw.steps == 150 and 0.2 < elapsed < REPLY_S
        assert port.received.count("G4 P0") >= 2
    finally:
        stage.close()


def test_refused_command_is_a_device_error(machine):
    port, m, raw = machine
    with pytest.raises(DeviceError) as exc:
        open_stage(gcode_keys(port.path, init_commands=["G21", "M999"]))
    msg = str(exc.value)
    assert "'M999'" in msg and "refused" in msg and "error:20" in msg and one_line(msg)


def test_soft_limits_and_stop(machine):
    port, m, raw = machine
    stage = open_stage(gcode_keys(port.path, min_steps=0, max_steps=400, feed_per_min=60.0))
    try:
        with pytest.raises(LimitError):
            stage.move_to(401)
        assert not any(line.startswith("G1") for line in port.received)
        # A long scan, stopped part way: M410 is handled at once, even mid-move.
        stage.start_scan(400, 100.0)
        assert wait_for(lambda: 0 < raw.steps)
        stage.stop()
        assert wait_for(lambda: not m.busy())
        assert 0 < raw.steps < 400 and "M410" in port.received
    finally:
        stage.close()


def test_garbled_ok_is_retried_and_pulled_cable_is_fatal(machine):
    port, m, raw = machine
    stage = open_stage(gcode_keys(port.path, feed_per_min=60000.0))
    port.faults.inject("garble", 2)
    stage.move_to(130)
    assert raw.steps == 130
    port.faults.close_after = 3
    with pytest.raises(DeviceError) as exc:
        for target in range(131, 160):
            stage.move_to(target)
    assert "cable pulled" in str(exc.value) and port.path in str(exc.value)
    stage.close()


def test_bad_settings_are_named():
    with pytest.raises(BAD_SETTING) as exc:
        open_stage(gcode_keys("/dev/null", axis="Q"))
    assert "[stage] axis" in str(exc.value)
    with pytest.raises(BAD_SETTING) as exc:
        open_stage(gcode_keys("/dev/null", decimals=2))   # 0.01 deg cannot resolve 0.000625 deg
    assert "[stage] decimals" in str(exc.value)
