"""The emulators themselves: SCPI header rules, G-code words, configurable stepper, faults.

Talked to with bare pyserial (no project driver in between), so a driver bug
cannot hide an emulator bug.
"""
from __future__ import annotations

import time

import pytest
import serial

from sims.emulators import (CombPhysics, LockedPhysics, PhotodiodeMeter, StepperProtocol,
                            start_gcode_machine, start_instrument, start_stepper)
from sims.emulators.gcode_machine import parse_words
from sims.emulators.scpi_meter import scpi_header_rx

# A reply that is due can still take a while on a loaded machine; readline returns
# as soon as the line is in, so a generous timeout costs nothing when all is well.
REPLY_S = 3.0


@pytest.mark.parametrize("header, ok", [
    # SCPI-99 (from memory): each node in its short form (the capitals) or its long form,
    # any case; optional nodes in brackets may be left out; a leading colon is allowed.
    ("MEAS:VOLT:DC?", True), ("measure:voltage:dc?", True), (":MEASure:VOLTage:DC?", True),
    ("MEAS?", True), ("MEAS:DC?", True), ("MEASU:VOLT:DC?", False), ("MEA:VOLT?", False),
    ("MEAS:VOLT:AC?", False), ("MEAS:VOLT:DC", False),
])
def test_scpi_short_and_long_forms(header, ok):
    assert bool(scpi_header_rx("MEASure[:VOLTage][:DC]?").fullmatch(header)) is ok


def test_gcode_words():
    # RS274NGC: a word is a letter and a number; comments in parentheses; N is a line number.
    assert parse_words("N10 G1 X-1.5 F60 (to the stop) ; trailing") == [
        ("N", 10.0), ("G", 1.0), ("X", -1.5), ("F", 60.0)]
    assert parse_words("g4 p0.25") == [("G", 4.0), ("P", 0.25)]


def test_stepper_protocol_json_round_trip_and_unknown_fields():
    p = StepperProtocol(move_abs="GO {steps}", ack=None)
    assert StepperProtocol.from_json(p.to_json()) == p
    with pytest.raises(ValueError, match="unknown stepper protocol fields: moov"):
        StepperProtocol.from_json('{"moov": "x"}')


def test_stepper_speaks_its_configured_protocol_and_moves_in_time():
    raw = CombPhysics()
    proto = StepperProtocol(eol_in="\n", eol_out="\r\n", move_abs="@1 GOTO {steps}", ack="*",
                            query_position="@1 WHERE", position_reply="@1 AT {steps} STEPS",
                            speed_steps_per_s=200.0)
    port, ctl = start_stepper(LockedPhysics(raw), proto)
    try:
        with serial.Serial(port.path, timeout=REPLY_S) as s:
            s.write(b"@1 GOTO 200\n")
            assert s.readline() == b"*\r\n"
            s.write(b"BUSY?\n")
            assert s.readline() == b"1\r\n"             # 200 steps at 200 steps/s: still moving
            t0 = time.monotonic()
            while time.monotonic() - t0 < 5.0:
                s.write(b"BUSY?\n")
                if s.readline() == b"0\r\n":
                    break
                time.sleep(0.05)
            assert 0.5 < time.monotonic() - t0 < 5.0     # about one second of motion
            s.write(b"@1 WHERE\n")
            assert s.readline() == b"@1 AT 200 STEPS\r\n"
            s.write(b"NONSENSE\n")
            assert s.readline() == b"ERR\r\n"
        assert raw.path == list(range(1, 201))        # the bench saw every step on the way
    finally:
        port.close()


def test_faults_and_pulled_cable():
    port, ctl = start_stepper(LockedPhysics(CombPhysics()), StepperProtocol())
    with serial.Serial(port.path, timeout=REPLY_S) as s:
        port.faults.inject("garble", 1)
        s.write(b"POS?\r")
        line = s.readline()
        assert line != b"POS 0\r\n" and b"\xfe" in line
        port.faults.inject("wrong_eol", 1)
        s.write(b"POS?\r")
        assert s.read(6) == b"POS 0;"
        port.faults.late_s = 0.2
        port.faults.inject("late", 1)
        t0 = time.monotonic()
        s.write(b"POS?\r")
        assert s.readline() == b"POS 0\r\n" and time.monotonic() - t0 >= 0.19
        port.pull_cable()
        with pytest.raises(serial.SerialException):
            s.write(b"POS?\r")
            s.readline()


def test_scpi_meter_error_queue_and_semicolons():
    raw = CombPhysics()
    port = start_instrument(PhotodiodeMeter(LockedPhysics(raw)))
    try:
        with serial.Serial(port.path, timeout=REPLY_S) as s:
            s.write(b"*IDN?;MEAS?\n")
            idn, value = s.readline().decode().strip().split(";")
            assert idn.startswith("Modetick Emulated") and float(value) == pytest.approx(raw.value_at(0))
            s.write(b"BOGUS:QUERY?\n")
            s.timeout = 0.3
            assert s.readline() == b""                    # no reply to an unknown query
            s.timeout = REPLY_S
            s.write(b"SYST:ERR?\n")
            assert s.readline() == b'-113,"Undefined header"\n'
            s.write(b"SYSTem:ERRor:NEXT?\n")
            assert s.readline() == b'+0,"No error"\n'
    finally:
        port.close()


def test_gcode_machine_plans_and_syncs():
    raw = CombPhysics()
    port, m = start_gcode_machine(LockedPhysics(raw), units_per_step=0.01)
    try:
        with serial.Serial(port.path, timeout=REPLY_S) as s:
            s.write(b"G90\nG1 X1.00 F300\n")             # 100 steps at 5 units/s = 0.2 s
            assert s.readline() == b"ok\n" and s.readline() == b"ok\n"   # planned: ok at once
            t0 = time.monotonic()
            s.write(b"G4 P0\n")
            assert s.readline() == b"ok\n"               # after the move
            assert time.monotonic() - t0 > 0.1 and raw.steps == 100
            s.write(b"M114\n")
            assert s.readline().startswith(b"X:1.0000 ") and s.readline() == b"ok\n"
            s.write(b"G91\nG1 X-0.50\nG4 P0\nM114\n")
            lines = [s.readline() for _ in range(5)]
            assert lines[3].startswith(b"X:0.5000 ") and raw.steps == 50
    finally:
        port.close()
