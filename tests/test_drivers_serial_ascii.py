"""serial-ascii stage and detector through real pyserial on pseudo-terminals.

The controller is the protocol-configurable emulator (sims.emulators.stepper);
every driver is configured only through rig-file text.
"""
from __future__ import annotations

import time

import pytest

from drivers.base import DeviceError, LimitError, TransientDeviceError
from drivers.registry import DETECTOR_DRIVERS, STAGE_DRIVERS
from sims.emulators import StepperProtocol, start_line_meter, start_stepper
from tests.test_drivers_support import (REPLY_S, WAITED_S, comb, one_line, sections,  # noqa: F401
                                        stepper_stage_keys, wait_for)

from daq.rig import RigError  # noqa: E402

# A bad setting is refused by the rig loader (RigError) or, for what only the
# device can tell (a file that is not there, a frame size), when it opens.
BAD_SETTING = (RigError, DeviceError)


def open_stage(s):
    return STAGE_DRIVERS[s["stage"]["driver"]].factory(s, None)


@pytest.fixture
def stepper(comb):
    raw, physics = comb
    port, ctl = start_stepper(physics, StepperProtocol())
    yield port, ctl, raw
    port.close()


def test_moves_reach_the_physics_and_report_back(stepper):
    port, ctl, raw = stepper
    s = sections(stepper_stage_keys(port.path, StepperProtocol()))
    stage = open_stage(s)
    try:
        assert "EMU-STEP" in stage.identify()
        for target in (120, 121, 160, 90, 90, 250):
            stage.move_to(target)
            assert raw.steps == target            # the bench moved there
            assert stage.position_steps() == target
        assert not ctl.motion.busy()
    finally:
        stage.close()
    assert wait_for(lambda: ctl.motion.stops >= 1)   # close() sent the stop command


UNSEEN_PROTOCOLS = {
    # echoing controller, axis-prefixed words, word replies, LF in / CRLF out
    "echo-words": StepperProtocol(eol_in="\n", eol_out="\r\n", move_abs="@1 GOTO {steps}", ack="*",
                                  query_position="@1 WHERE", position_reply="@1 AT {steps} STEPS",
                                  busy_query="@1 STAT", busy_reply="MOVING", idle_reply="READY",
                                  stop="@1 HALT", echo=True, identify_query=None, set_speed=None,
                                  speed_steps_per_s=4000.0),
    # no ack and no busy query (completion seen by polling the position), ';' terminates both ways
    "silent-semicolon": StepperProtocol(eol_in=";", eol_out=";", move_abs="X{steps}", ack=None,
                                        query_position="X?", position_reply="{steps}", busy_query=None,
                                        stop="K", identify_query=None, set_speed=None,
                                        speed_steps_per_s=8000.0),
    # a bracketed reply format and a CR-only terminator
    "brackets": StepperProtocol(eol_in="\r", eol_out="\r", move_abs="<M,{steps}>", ack="<A>",
                                query_position="<P>", position_reply="<P,{steps}>", busy_query="<B>",
                                busy_reply="<B,1>", idle_reply="<B,0>", stop="<S>",
                                identify_query="<V>", identify_reply="<V,TRX-7 r3>"),
}


@pytest.mark.parametrize("name", sorted(UNSEEN_PROTOCOLS))
def test_protocols_described_only_in_the_rig_file(comb, name):
    raw, physics = comb
    proto = UNSEEN_PROTOCOLS[name]
    port, ctl = start_stepper(physics, proto)
    try:
        stage = open_stage(sections(stepper_stage_keys(port.path, proto, eol=proto.eol_out)))
        path = list(range(100, 141)) + list(range(140, 99, -1))
        for target in path:
            stage.move_to(target)
            assert raw.steps == target
        assert stage.position_steps() == 100
        stage.close()
        assert ctl.motion.moves == len(path)
    finally:
        port.close()


def test_soft_limits_refuse_before_anything_is_sent(stepper):
    port, ctl, raw = stepper
    stage = open_stage(sections(stepper_stage_keys(port.path, StepperProtocol(), min_steps=0, max_steps=500)))
    try:
        stage.move_to(500)
        sent_before = list(port.received)
        for bad in (501, -1, 10**9):
            with pytest.raises(LimitError) as exc:
                stage.move_to(bad)
            assert str(bad) in str(exc.value) and "nothing was sent" in str(exc.value)
        assert port.received == sent_before
        assert raw.steps == 500
    finally:
        stage.close()


def test_garbled_and_late_replies_are_retried(stepper):
    port, ctl, raw = stepper
    stage = open_stage(sections(stepper_stage_keys(port.path, StepperProtocol(), retries=3,
                                                   timeout_s=WAITED_S)))
    try:
        port.faults.inject("garble", 2)
        stage.move_to(150)
        assert port.faults.injected["garble"] == 2 and raw.steps == 150
        # Late by well over the timeout, so a stalled machine cannot make it look on time.
        port.faults.late_s = 1.5 * WAITED_S
        port.faults.inject("late", 1)
        t0 = time.monotonic()
        stage.move_to(151)
        assert raw.steps == 151 and stage.position_steps() == 151
        assert port.received.count("MA 151") >= 2           # timed out and sent again
        assert time.monotonic() - t0 < port.faults.late_s + 2 * WAITED_S   # no pile-up of timeouts
    finally:
        stage.close()


def test_replies_that_never_come_end_in_one_line_naming_port_and_command(stepper):
    port, ctl, raw = stepper
    # Only timeouts here (every reply is dropped), so a short one keeps the test quick.
    stage = open_stage(sections(stepper_stage_keys(port.path, StepperProtocol(), retries=2, timeout_s=0.2)))
    try:
        stops = ctl.motion.stops
        port.faults.inject("drop", 10)
        with pytest.raises(DeviceError) as exc:
            stage.move_to(170)
        msg = str(exc.value)
        assert not isinstance(exc.value, TransientDeviceError)
        assert port.path in msg and "'MA 170'" in msg and "no reply" in msg and "3 tries" in msg
        assert one_line(msg)
        assert wait_for(lambda: ctl.motion.stops > stops)   # the stop command went out on the way out
    finally:
        stage.close()


def test_wrong_terminator(stepper):
    port, ctl, raw = stepper
    # A controller ending lines in \n where the rig file says \r: CR/LF endings are interchangeable.
    port.eol_out = b"\n"
    # The timeouts below are waited out; the partial reply must still come in within one.
    stage = open_stage(sections(stepper_stage_keys(port.path, StepperProtocol(), eol="\r", retries=1,
                                                   timeout_s=WAITED_S)))
    stage.move_to(130)
    assert stage.position_steps() == 130
    # A terminator that is not a line end at all: times out, retried, then a clear error.
    port.faults.wrong_eol_text = "|"
    port.faults.inject("wrong_eol", 1)
    stage.move_to(131)                                # one bad reply: the retry gets through
    port.faults.inject("wrong_eol", 10)
    with pytest.raises(DeviceError) as exc:
        stage.move_to(132)
    msg = str(exc.value)
    assert "without the line terminator" in msg and "'OK|'" in msg and one_line(msg)
    stage.close()


def test_pulled_cable_mid_sweep(stepper):
    port, ctl, raw = stepper
    stage = open_stage(sections(stepper_stage_keys(port.path, StepperProtocol(), timeout_s=REPLY_S)))
    port.faults.close_after = 40                      # about a dozen moves in
    t0 = time.monotonic()
    with pytest.raises(DeviceError) as exc:
        for target in range(100, 300):
            stage.move_to(target)
    msg = str(exc.value)
    assert "cable pulled" in msg and port.path in msg and one_line(msg)
    assert time.monotonic() - t0 < REPLY_S            # not even one reply timeout waited out on a dead port
    stage.stop()                                      # still safe after the fault
    stage.close()
    stage.close()


def test_nonexistent_port_is_one_line():
    with pytest.raises(DeviceError) as exc:
        open_stage(sections(stepper_stage_keys("/dev/ttyNOSUCH9", StepperProtocol())))
    msg = str(exc.value)
    assert msg.startswith("stage port /dev/ttyNOSUCH9: cannot open it (no such port") and one_line(msg)


def test_limit_switch_hit_is_a_device_error(comb):
    raw, physics = comb
    proto = StepperProtocol(max_travel_steps=400)
    port, ctl = start_stepper(physics, proto)
    stage = open_stage(sections(stepper_stage_keys(port.path, proto, retries=1)))
    try:
        with pytest.raises(DeviceError) as exc:
            stage.move_to(450)
        assert "idle at 400 steps instead of 450" in str(exc.value)
    finally:
        stage.close()
        port.close()


def test_move_timeout_stops_the_motor(comb):
    raw, physics = comb
    proto = StepperProtocol(speed_steps_per_s=50.0)
    port, ctl = start_stepper(physics, proto)
    stage = open_stage(sections(stepper_stage_keys(port.path, proto, move_timeout_s=0.15)))
    try:
        with pytest.raises(DeviceError) as exc:
            stage.move_to(200)                        # 4 s of travel: far more than any stall
        assert "not finished after 0.15 s" in str(exc.value)
        assert wait_for(lambda: not ctl.motion.busy()) and 0 < raw.steps < 200   # stopped part way
    finally:
        stage.close()
        port.close()


def test_pyserial_url_port(stepper, tmp_path):
    # pyserial's spy:// URL wraps the real port and logs the traffic: URLs work as ports.
    port, ctl, raw = stepper
    log = tmp_path / "traffic.txt"
    stage = open_stage(sections(stepper_stage_keys(f"spy://{port.path}?file={log}", StepperProtocol())))
    stage.move_to(142)
    stage.close()
    assert raw.steps == 142
    assert "MA 142" in log.read_text(errors="replace")


def test_scan_moves_at_the_set_speed(comb):
    raw, physics = comb
    proto = StepperProtocol()
    port, ctl = start_stepper(physics, proto)
    stage = open_stage(sections(stepper_stage_keys(port.path, proto)))
    try:
        stage.move_to(100)
        t0 = time.monotonic()
        # 100 steps at 100 steps/s = 1 s (the controller's own speed would take 2 ms): long
        # enough to see the position climb even if polling stalls for half a second.
        stage.start_scan(200, 100.0)
        seen = []
        while stage.is_moving():
            seen.append(stage.position_steps())
            time.sleep(0.01)
        elapsed = time.monotonic() - t0
        assert raw.steps == 200 and 0.95 < elapsed < 3.0
        assert len(set(seen)) > 5 and seen == sorted(seen)
    finally:
        stage.close()
        port.close()


def test_bad_protocol_settings_are_named():
    keys = stepper_stage_keys("/dev/null", StepperProtocol(), position_reply="POS (\\d+)")
    with pytest.raises(BAD_SETTING) as exc:
        open_stage(sections(keys))
    assert "[stage] position_reply" in str(exc.value) and "(?P<steps>" in str(exc.value)
    keys = stepper_stage_keys("/dev/null", StepperProtocol(), move_abs="MA {pos}")
    with pytest.raises(BAD_SETTING) as exc:
        open_stage(sections(keys))
    assert "[stage] move_abs" in str(exc.value)


# -- the serial-ascii detector ----------------------------------------------------------

def meter_keys(port_path: str, **overrides) -> dict:
    keys = dict(driver="serial-ascii", port=port_path, eol="\r", query="D?",
                value_reply=r"D=(?P<value>[-+]?\d+\.\d+e[-+]\d+) V", timeout_s=REPLY_S, backoff_s=0.01)
    keys.update(overrides)
    return keys


def test_line_meter_reads_the_physics(comb):
    raw, physics = comb
    port, meter = start_line_meter(physics)
    try:
        s = sections({"driver": "sim"}, meter_keys(port.path))
        det = DETECTOR_DRIVERS["serial-ascii"].factory(s, None)
        for steps in (20, 21, 35):
            raw.steps = steps
            # "D=%+.6e V" carries 7 significant digits
            assert det.read().value == pytest.approx(raw.value_at(steps), rel=1e-6)
        port.faults.inject("garble", 1)
        assert det.read().value == pytest.approx(raw.value_at(35), rel=1e-6)
        det.close()
        s = sections({"driver": "sim"}, meter_keys(port.path, value_reply=r"V=(?P<value>\S+)", retries=1))
        det = DETECTOR_DRIVERS["serial-ascii"].factory(s, None)
        with pytest.raises(DeviceError) as exc:
            det.read()
        assert "expected value_reply" in str(exc.value) and "'D=" in str(exc.value)
        det.close()
    finally:
        port.close()
