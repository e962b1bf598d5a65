"""``modetick check RIG``: open every device of a rig, identify it, read once, move nothing.

What it does, in order: validate the rig file; open the stage and the
detector (and the ``[aux]`` instrument) exactly as a sweep would, but write
no setpoints; ask each for its identity; ask the stage where it is (so a
stage that does not answer fails here, not at the first step of a night's
run); take one reading; close everything (the stage's stop command is sent,
as on every exit). Exit 0 when all answered and the stage is inside its soft
limits, 1 with one line on a device fault, 2 for a bad rig file.
"""
from __future__ import annotations

import json
import math

from daq.errors import fail
from daq.rig import RigError, load_rig

HELP = "open the rig's devices, identify them, read once; moves nothing"


def configure(p) -> None:
    p.add_argument("rig", metavar="RIG", help="rig file (TOML) to check")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a rig-file key (repeatable), e.g. --set stage.port=/dev/ttyUSB1")
    p.add_argument("--json", action="store_true", help="print the findings as one JSON object on stdout")


def _where(section: dict) -> str:
    for key in ("port", "resource", "source"):
        if section.get(key):
            return f", {section[key]}"
    return ""


def inspect(sections: dict) -> dict:
    """Open, identify, read once, close. Raises DeviceError on the first fault."""
    from drivers.registry import open_devices

    stage, detector, bench = open_devices(sections, write_setpoints=False)
    try:
        found = {"stage": {"driver": sections["stage"]["driver"], "identity": stage.identify(),
                           "position_steps": stage.position_steps()},
                 "detector": {"driver": sections["detector"]["driver"], "identity": detector.identify()}}
        r = detector.read()
        found["detector"].update(value=r.value, spread=r.spread, aux=r.aux)
    finally:
        for close in (stage.close, detector.close):
            try:
                close()
            except Exception:  # noqa: BLE001 - the first fault is the one to report
                pass
    return found


def run(args) -> int:
    from drivers.base import DeviceError

    try:
        rig = load_rig(args.rig, args.set)
    except RigError as exc:
        return fail(exc, 2)
    try:
        found = inspect(rig.sections)
    except DeviceError as exc:
        return fail(exc, 1)
    except OSError as exc:
        return fail(f"cannot open devices: {exc}", 1)

    st, sw = rig["stage"], rig["sweep"]
    lo, hi = st["min_steps"], st["max_steps"]
    pos = found["stage"]["position_steps"]
    problems = []
    if (lo is not None and pos < lo) or (hi is not None and pos > hi):
        problems.append(f"stage reports {pos} steps, outside its soft limits [{lo}, {hi}]: "
                        "is the controller's zero where the rig file assumes?")
    if not math.isfinite(found["detector"]["value"]):
        problems.append("detector reading is not a finite number")
    setpoints = [sp["command"].format(value=sp["value"]) for sp in (rig.sections.get("aux") or {}).get("setpoints", [])]
    found["setpoints_not_written"] = setpoints
    found["problems"] = problems

    if args.json:
        print(json.dumps(found, default=float))
    else:
        s, d = found["stage"], found["detector"]
        print(f"rig file: {rig.source}")
        print(f"stage ({s['driver']}{_where(st)}): {s['identity']}")
        limits = f"soft limits [{lo}, {hi}]" if (lo is not None or hi is not None) else "no soft limits set"
        print(f"  answers: at {pos} steps; {limits}; sweep {sw['start']} -> {sw['stop']} "
              f"step {sw['step']}, {sw['passes']} pass(es)")
        print(f"detector ({d['driver']}{_where(rig['detector'])}): {d['identity']}")
        print(f"  one reading: {d['value']:.6g} (spread {d['spread']:.3g}, "
              f"{rig['detector']['reads_per_step']} read(s) averaged)")
        for key, value in sorted(d["aux"].items()):
            print(f"  {key} = {value:.6g}")
        for cmd in setpoints:
            print(f"  setpoint not written by check (a sweep writes it, allow_write = true): {cmd}")
        print("nothing was moved")
    if problems:
        return fail(problems[0], 1)
    return 0
