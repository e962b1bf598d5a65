"""Protocol-level emulators of bench instruments, on pseudo-terminals.

Each emulator is a device logic (``Handler``) served by a ``PtyPort`` thread;
drivers reach it through real pyserial or pyvisa-py on ``port.path``. All of
them move or read one shared simulated bench (``LockedPhysics``), so a sweep
through the serial stack sees real blips. Start them in-process from a test
(``start_stepper``, ``start_instrument``...) or as a separate process with
``python -m sims.emulators`` (prints the pty paths as one JSON line).
"""
from sims.emulators.gcode_machine import GcodeMachine, start_gcode_machine
from sims.emulators.line_meter import LineMeter, start_line_meter
from sims.emulators.physics import CombPhysics, LockedPhysics, bench_from_rig
from sims.emulators.pty_port import Faults, Handler, PtyPort, Reply
from sims.emulators.scpi_meter import (LaserController, PhotodiodeMeter, ScpiInstrument,
                                       start_instrument, visa_resource)
from sims.emulators.stepper import StepperController, StepperProtocol, start_stepper

__all__ = [
    "CombPhysics", "Faults", "GcodeMachine", "Handler", "LaserController", "LineMeter", "LockedPhysics",
    "PhotodiodeMeter", "PtyPort", "Reply", "ScpiInstrument", "StepperController",
    "StepperProtocol", "bench_from_rig", "start_gcode_machine", "start_instrument",
    "start_line_meter", "start_stepper", "visa_resource",
]
