"""Run emulators as a separate process, for CLI tests and trying a rig file by hand.

    python -m sims.emulators --rig RIG.toml --stepper --meter
    python -m sims.emulators --rig RIG.toml --stepper-protocol proto.json --meter --laser \\
        --fault stepper:garble=3 --close-after meter:500

Prints one JSON line on stdout, {"stepper": "/dev/pts/N", "meter": ...,
"meter_resource": "ASRL/dev/pts/M::INSTR", "truth": {...}}, then serves until
SIGTERM, SIGINT or the parent process ends. The physics is the simulated
bench built from the rig file's sections (``--physics module:factory`` to use
another). Point the rig at the printed paths, e.g. with
``modetick sweep --config RIG --set stage.port=/dev/pts/N``.
"""
from __future__ import annotations

import argparse
import json
import os
import signal
import sys
import threading

from sims.emulators.gcode_machine import start_gcode_machine
from sims.emulators.line_meter import start_line_meter
from sims.emulators.physics import bench_from_rig
from sims.emulators.scpi_meter import LaserController, PhotodiodeMeter, start_instrument, visa_resource
from sims.emulators.stepper import StepperProtocol, start_stepper


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="python -m sims.emulators", description=__doc__.split("\n\n")[0])
    p.add_argument("--rig", help="rig file whose [sim], [stage] and [sweep] sections set up the physics "
                                 "(default: configs/sim.toml)")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a rig-file key, as for modetick (e.g. the sweep range the truth is for)")
    p.add_argument("--physics", help="module:factory building the physics from the rig sections")
    p.add_argument("--stepper", action="store_true", help="ASCII stepper controller (default protocol)")
    p.add_argument("--stepper-protocol", metavar="JSON|@FILE",
                   help="stepper protocol fields as JSON (see sims.emulators.stepper.StepperProtocol)")
    p.add_argument("--gcode", type=float, metavar="UNITS_PER_STEP", help="G-code controller, X axis")
    p.add_argument("--meter", action="store_true", help="SCPI photodiode meter (VISA serial resource)")
    p.add_argument("--meter-gain", type=float, default=1.0, help="meter volts per physics unit")
    p.add_argument("--line-meter", action="store_true", help="plain ASCII meter: 'D?' -> 'D=<value> V'")
    p.add_argument("--laser", action="store_true", help="SCPI laser current/temperature controller")
    p.add_argument("--fault", action="append", default=[], metavar="DEVICE:KIND=N",
                   help="inject N faults (garble, late, drop, wrong_eol) or a rate (rate_garble=0.01)")
    p.add_argument("--late-s", type=float, default=0.5, help="delay of a late reply")
    p.add_argument("--close-after", action="append", default=[], metavar="DEVICE:N",
                   help="pull the cable after N more commands")
    return p


def _rig_sections(path: str | None, overrides: list[str]) -> dict:
    from daq.rig import load_rig
    return load_rig(path, overrides).sections


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    physics = bench_from_rig(_rig_sections(args.rig, args.set), args.physics)
    ports, info = {}, {}
    if args.stepper or args.stepper_protocol:
        proto = StepperProtocol()
        if args.stepper_protocol:
            text = args.stepper_protocol
            if text.startswith("@"):
                with open(text[1:], encoding="utf-8") as fh:
                    text = fh.read()
            proto = StepperProtocol.from_json(text)
        ports["stepper"], _ = start_stepper(physics, proto)
    if args.gcode:
        ports["gcode"], _ = start_gcode_machine(physics, args.gcode)
    if args.meter:
        ports["meter"] = start_instrument(PhotodiodeMeter(physics, gain=args.meter_gain), name="meter")
    if args.line_meter:
        ports["line_meter"], _ = start_line_meter(physics)
    if args.laser:
        ports["laser"] = start_instrument(LaserController(), name="laser")
    for spec in args.fault:
        device, _, rest = spec.partition(":")
        kind, _, n = rest.partition("=")
        faults = ports[device].faults
        faults.late_s = args.late_s
        if kind.startswith("rate_"):
            faults.rates[kind[5:]] = float(n)
        else:
            faults.inject(kind, int(n or 1))
    for spec in args.close_after:
        device, _, n = spec.partition(":")
        ports[device].faults.close_after = int(n)
    for name, port in ports.items():
        info[name] = port.path
        if name in ("meter", "laser"):
            info[f"{name}_resource"] = visa_resource(port)
    try:
        info["truth"] = physics.truth()
    except Exception as exc:  # a stand-in physics may have no truth
        info["truth_error"] = str(exc)
    print(json.dumps(info, default=float), flush=True)

    done = threading.Event()
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: done.set())
    parent = os.getppid()
    while not done.wait(0.2):
        if os.getppid() != parent:
            break
    for port in ports.values():
        port.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
