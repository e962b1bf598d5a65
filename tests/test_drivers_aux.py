"""[aux] readbacks, [detector] reads_per_step and open_devices, over real ptys and pyvisa.

Safety rule under test (common practice): nothing is ever
written to the laser's current/temperature controller unless the rig file
allows it, and then only within the limits given beside the value.
"""
from __future__ import annotations

import statistics
from pathlib import Path

import pytest

from drivers.base import DeviceError
from drivers.registry import open_devices
from sims.emulators import (LaserController, LockedPhysics, PhotodiodeMeter, StepperProtocol,
                            start_instrument, start_line_meter, start_stepper, visa_resource)
from tests.test_drivers_support import REPLY_S, comb, section, sections, stepper_stage_keys, wait_for  # noqa: F401

SIM_YAML = Path(__file__).resolve().parent.parent / "sims" / "emulators" / "bench-sim.yaml"

from daq.rig import RigError  # noqa: E402

# A bad setting is refused by the rig loader (RigError) or, for what only the
# device can tell (a file that is not there, a frame size), when it opens.
BAD_SETTING = (RigError, DeviceError)


@pytest.fixture
def bench(comb):
    raw, physics = comb
    stepper, ctl = start_stepper(physics, StepperProtocol())
    meter = start_instrument(PhotodiodeMeter(physics))
    laser_inst = LaserController(current_mA=71.25, temp_C=23.5)
    laser = start_instrument(laser_inst, name="laser")
    yield stepper, ctl, meter, laser, laser_inst, raw
    for port in (stepper, meter, laser):
        port.close()


def rig(bench, channels: list[dict]) -> dict:
    """A rig over the three emulators with the given aux channels (an array of inline tables)."""
    stepper, ctl, meter, laser, laser_inst, raw = bench
    det = dict(driver="visa-scpi", resource=visa_resource(meter), timeout_s=REPLY_S, backoff_s=0.01)
    tables = ", ".join(f'{{ name = "{c["name"]}", query = "{c["query"]}" }}' for c in channels)
    extra = section("aux", resource=visa_resource(laser), timeout_s=REPLY_S, backoff_s=0.01) \
        + f"channels = [{tables}]\n"
    return sections(stepper_stage_keys(stepper.path, StepperProtocol()), det, extra=extra)


def rig_text_setpoints(bench, allow_write: bool, value: float, lo: float = 20.0, hi: float = 30.0) -> dict:
    stepper, ctl, meter, laser, laser_inst, raw = bench
    extra = (section("aux", resource=visa_resource(laser), allow_write=allow_write, timeout_s=REPLY_S)
             + 'channels = [{ name = "temp_C", query = "SOUR:TEMP?" }]\n'
             + f'setpoints = [{{ command = "SOUR:TEMP {{value:.3f}}", value = {value}, min = {lo}, '
               f'max = {hi}, readback = "SOUR:TEMP?" }}]\n')
    det = dict(driver="visa-scpi", resource=visa_resource(meter), timeout_s=REPLY_S)
    return sections(stepper_stage_keys(stepper.path, StepperProtocol()), det, extra=extra)


def test_readbacks_ride_along_and_nothing_is_written(bench):
    stepper, ctl, meter, laser, laser_inst, raw = bench
    s = rig(bench, [{"name": "current_mA", "query": "SOUR:CURR?"},
                    {"name": "temp_C", "query": "SENS:TEMP?"}])
    stage, det, _ = open_devices(s)
    try:
        stage.move_to(120)
        r = det.read()
        assert r.value == pytest.approx(raw.value_at(120), rel=1e-7)
        assert r.aux == {"current_mA": 71.25, "temp_C": 23.502}
        assert "LDC-2" in det.identify()
    finally:
        stage.close()
        det.close()
    assert laser_inst.writes == []          # not even *CLS: the controller is only asked questions


def test_setpoints_need_allow_write(bench):
    stepper, ctl, meter, laser, laser_inst, raw = bench
    with pytest.raises(BAD_SETTING) as exc:
        open_devices(rig_text_setpoints(bench, allow_write=False, value=25.0))
    assert "[aux] setpoints" in str(exc.value) and "allow_write" in str(exc.value)
    assert laser_inst.writes == [] and laser_inst.temp_C == 23.5


def test_setpoint_outside_its_limits_is_never_sent(bench):
    stepper, ctl, meter, laser, laser_inst, raw = bench
    with pytest.raises(BAD_SETTING) as exc:
        open_devices(rig_text_setpoints(bench, allow_write=True, value=31.0))
    assert "outside its limits [20.0, 30.0]" in str(exc.value)
    assert laser_inst.writes == [] and laser_inst.temp_C == 23.5


def test_allowed_setpoint_is_written_once_and_read_back(bench):
    stepper, ctl, meter, laser, laser_inst, raw = bench
    s = rig_text_setpoints(bench, allow_write=True, value=25.5)
    from daq.cmd_check import inspect
    found = inspect(s)                       # modetick check writes nothing, even when allowed
    assert found["detector"]["aux"] == {"temp_C": 23.5}
    assert laser_inst.writes == []
    stage, det, _ = open_devices(s)
    try:
        assert wait_for(lambda: laser_inst.writes == ["SOUR:TEMP 25.500"])
        assert det.read().aux == {"temp_C": 25.5}
    finally:
        stage.close()
        det.close()


def test_a_channel_that_is_not_a_query_is_refused(bench):
    stepper, ctl, meter, laser, laser_inst, raw = bench
    with pytest.raises(BAD_SETTING) as exc:
        open_devices(rig(bench, [{"name": "current_mA", "query": "SOUR:CURR 80"}]))
    assert "read-only" in str(exc.value)
    assert laser_inst.writes == []


def test_aux_on_pyvisa_sim(bench):
    stepper, ctl, meter, laser, laser_inst, raw = bench
    s = sections(stepper_stage_keys(stepper.path, StepperProtocol()),
                 dict(driver="visa-scpi", resource=visa_resource(meter)),
                 extra=section("aux", resource="USB0::0x0000::0x0001::SIM0007::INSTR",
                               visa_library=f"{SIM_YAML}@sim")
                 + 'channels = [{ name = "current_mA", query = "SOUR:CURR?" }]\n')
    stage, det, _ = open_devices(s)
    assert det.read().aux == {"current_mA": 62.5}
    stage.close()
    det.close()


class SequencePhysics:
    """Readings from a fixed list, one per read (to check the averaging against statistics)."""

    def __init__(self, values):
        self.values, self.i = list(values), 0

    def move_to(self, steps):
        pass

    def position_steps(self):
        return 0

    def read_value(self):
        v = self.values[self.i % len(self.values)]
        self.i += 1
        return v


def test_reads_per_step_mean_and_spread(bench):
    stepper = bench[0]
    values = [0.51, 0.47, 0.55, 0.49, 1.02, 0.98, 1.07, 0.93]
    port, meter = start_line_meter(LockedPhysics(SequencePhysics(values)))
    try:
        det_keys = dict(driver="serial-ascii", port=port.path, eol="\r", query="D?",
                        value_reply=r"D=(?P<value>\S+) V", reads_per_step=4)
        stage, det, _ = open_devices(sections(stepper_stage_keys(stepper.path, StepperProtocol()), det_keys))
        first, second = det.read(), det.read()
        stage.close()
        det.close()
    finally:
        port.close()
    # Reference: Python's statistics module (sample standard deviation, n - 1).
    assert first.value == pytest.approx(statistics.mean(values[:4]), rel=1e-6)
    assert first.spread == pytest.approx(statistics.stdev(values[:4]), rel=1e-5)
    assert second.value == pytest.approx(statistics.mean(values[4:]), rel=1e-6)
    assert second.spread == pytest.approx(statistics.stdev(values[4:]), rel=1e-5)


def test_a_detector_that_fails_to_open_releases_the_stage(bench):
    stepper, ctl, meter, laser, laser_inst, raw = bench
    s = sections(stepper_stage_keys(stepper.path, StepperProtocol()),
                 dict(driver="visa-scpi", resource="ASRL/dev/ttyNOSUCH3::INSTR"))
    with pytest.raises(DeviceError) as exc:
        open_devices(s)
    assert "ASRL/dev/ttyNOSUCH3::INSTR" in str(exc.value)
    assert wait_for(lambda: ctl.motion.stops == 1)     # the stage was stopped and closed again
