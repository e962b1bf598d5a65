"""visa-scpi detector through real pyvisa: pyvisa-py on a pty (ASRL) and pyvisa-sim.

IEEE 488.2 facts used: *IDN? answers four comma-separated fields
(manufacturer, model, serial, firmware); *CLS clears the error queue. SCPI:
SYST:ERR? pops the oldest error, "0,No error" when empty; -113 is "Undefined
header" (SCPI-99 error list, from memory).
"""
from __future__ import annotations

from pathlib import Path

import pytest

from drivers.base import DeviceError
from drivers.registry import DETECTOR_DRIVERS
from sims.emulators import PhotodiodeMeter, StepperProtocol, start_instrument, start_stepper, visa_resource
from tests.test_drivers_support import REPLY_S, WAITED_S, comb, one_line, sections, wait_for  # noqa: F401

SIM_YAML = Path(__file__).resolve().parent.parent / "sims" / "emulators" / "bench-sim.yaml"


def open_meter(**keys):
    base = dict(driver="visa-scpi", timeout_s=REPLY_S, backoff_s=0.01)
    base.update(keys)
    s = sections({"driver": "sim"}, base)
    return DETECTOR_DRIVERS["visa-scpi"].factory(s, None)


@pytest.fixture
def meter(comb):
    raw, physics = comb
    inst = PhotodiodeMeter(physics, gain=2.5, offset=0.01)
    port = start_instrument(inst)
    yield port, inst, raw
    port.close()


def test_reads_the_bench_through_an_asrl_resource(meter):
    port, inst, raw = meter
    det = open_meter(resource=visa_resource(port))
    try:
        assert det.identify() == "Modetick Emulated, PDM-100, EMU0042, 1.3"
        assert wait_for(lambda: "*CLS" in inst.writes)   # error queue cleared at open
        for steps in (20, 22, 27, 0):
            raw.steps = steps
            expected = 2.5 * raw.value_at(steps) + 0.01
            assert det.read().value == pytest.approx(expected, rel=1e-7)   # "%+.8E" has 9 digits
    finally:
        det.close()


def test_long_form_query_and_value_reply(meter):
    port, inst, raw = meter
    det = open_meter(resource=visa_resource(port), query=":MEASure:VOLTage:DC?",
                     value_reply=r"(?P<value>[-+]\d\.\d+E[-+]\d+)")
    raw.steps = 20
    assert det.read().value == pytest.approx(2.5 * raw.value_at(20) + 0.01, rel=1e-7)
    det.close()


def test_unknown_query_quotes_the_error_queue(meter):
    port, inst, raw = meter
    # Two timeouts waited out; SYST:ERR? in between must still be answered within one.
    det = open_meter(resource=visa_resource(port), query="MEAS:CURR:DC?", retries=1, timeout_s=WAITED_S)
    with pytest.raises(DeviceError) as exc:
        det.read()
    msg = str(exc.value)
    assert visa_resource(port) in msg and "'MEAS:CURR:DC?'" in msg and "no reply" in msg
    assert "SYST:ERR? -> '-113,\"Undefined header\"'" in msg and one_line(msg)
    det.close()


def test_garbled_and_dropped_replies_are_retried(meter):
    port, inst, raw = meter
    det = open_meter(resource=visa_resource(port), retries=3, timeout_s=WAITED_S)   # the drop is waited out
    raw.steps = 21
    port.faults.inject("garble", 1)
    assert det.read().value == pytest.approx(2.5 * raw.value_at(21) + 0.01, rel=1e-7)
    port.faults.inject("drop", 1)
    assert det.read().value == pytest.approx(2.5 * raw.value_at(21) + 0.01, rel=1e-7)
    assert port.faults.injected["garble"] == 1 and port.faults.injected["drop"] == 1
    det.close()


def test_pulled_cable_and_missing_port(meter):
    port, inst, raw = meter
    det = open_meter(resource=visa_resource(port))
    det.read()
    port.pull_cable()
    with pytest.raises(DeviceError) as exc:
        det.read()
    assert "cable pulled" in str(exc.value) and port.path in str(exc.value)
    det.close()
    with pytest.raises(DeviceError) as exc:
        open_meter(resource="ASRL/dev/ttyNOSUCH7::INSTR")
    msg = str(exc.value)
    assert msg.startswith("detector ASRL/dev/ttyNOSUCH7::INSTR: cannot open it (no such resource")
    assert one_line(msg)


def test_wrong_instrument_fails_the_identity_check(comb):
    raw, physics = comb
    # A stepper controller on the port the rig file calls a meter: *IDN? is not answered properly.
    port, ctl = start_stepper(physics, StepperProtocol(eol_in="\n", eol_out="\n", error_reply="ERR"))
    try:
        with pytest.raises(DeviceError) as exc:
            open_meter(resource=visa_resource(port), retries=0)
        assert "'*IDN?'" in str(exc.value) and "'ERR'" in str(exc.value)
    finally:
        port.close()


def test_overload_stops_with_advice(meter):
    port, inst, raw = meter
    inst.offset = 9.9e37          # what a SCPI meter sends when over range
    det = open_meter(resource=visa_resource(port))
    with pytest.raises(DeviceError) as exc:
        det.read()
    assert "overload" in str(exc.value)
    det.close()


def test_pyvisa_sim_backend():
    det = open_meter(resource="ASRL9::INSTR", visa_library=f"{SIM_YAML}@sim")
    assert det.identify().startswith("Modetick Emulated, PDM-100")
    assert det.read().value == 0.125                 # the definition's default reading
    det.close()


def test_a_late_reply_is_not_taken_for_the_error_queue_or_the_next_reading(meter):
    # The meter answers MEAS:VOLT:DC? after the driver has timed out; the driver then asks
    # SYST:ERR?, and the meter (busy until the late reply is out) answers that next. The late
    # number must not pass for the error queue's answer, nor the error queue's "0,..." for
    # the retried reading.
    port, inst, raw = meter
    det = open_meter(resource=visa_resource(port), retries=2, timeout_s=WAITED_S)
    raw.steps = 23
    expected = 2.5 * raw.value_at(23) + 0.01
    port.faults.late_s = 1.5 * WAITED_S
    port.faults.inject("late", 1)
    try:
        assert det.read().value == pytest.approx(expected, rel=1e-7)
        assert port.faults.injected["late"] == 1
        raw.steps = 25                  # and the exchange after it is in step again
        assert det.read().value == pytest.approx(2.5 * raw.value_at(25) + 0.01, rel=1e-7)
    finally:
        det.close()


@pytest.mark.parametrize("reply, is_queue", [
    ('0,"No error"', True), ('+0,"No error"', True), ('-113,"Undefined header"', True),
    ("0,No error", True), ('-113,"Undefined header ""FOO"""', True),   # a quote inside is doubled
    ("+1.51000000E+00", False), ("1,2", False), ("+2.5E-01,+3.0E-01", False)])
def test_error_queue_answers_told_from_readings(reply, is_queue):
    # SCPI-99 (from memory): SYST:ERR? answers <code>,"<message>"; a reading is a number
    from drivers.visa_link import SCPI_ERROR_REPLY
    assert bool(SCPI_ERROR_REPLY.fullmatch(reply)) is is_queue
