"""``modetick ports``: the serial ports and VISA resources this machine can see."""
from __future__ import annotations

import json
import warnings

HELP = "list serial ports and VISA resources (to find what to put in a rig file)"


def configure(p) -> None:
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")
    p.add_argument("--visa-library", default="@py", metavar="LIB",
                   help="pyvisa backend to ask: @py (pyvisa-py, default), \"\" (system VISA), file.yaml@sim")
    p.add_argument("--no-visa", action="store_true", help="list serial ports only")


def serial_ports() -> list[dict]:
    from serial.tools import list_ports

    out = []
    for info in sorted(list_ports.comports(), key=lambda i: i.device):
        out.append({"device": info.device, "description": info.description or "",
                    "hwid": info.hwid or ""})
    return out


def visa_resources(library: str) -> tuple[list[str], str | None]:
    """(resource strings, problem or None); the backend's discovery warnings are muted."""
    try:
        import pyvisa

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            rm = pyvisa.ResourceManager(library)
            return sorted(rm.list_resources()), None
    except Exception as exc:  # a missing backend or driver is a finding, not a crash
        return [], " ".join(str(exc).split()) or exc.__class__.__name__


def run(args) -> int:
    ports = serial_ports()
    visa, problem = ([], None) if args.no_visa else visa_resources(args.visa_library)
    if args.json:
        data = {"serial": ports}
        if not args.no_visa:
            data["visa"] = {"library": args.visa_library, "resources": visa, "problem": problem}
        print(json.dumps(data))
        return 0
    print("Serial ports (for [stage] port, or ASRL<port>::INSTR as a VISA resource):")
    for p in ports:
        extra = f"  {p['description']}" if p["description"] and p["description"] != "n/a" else ""
        hwid = f"  [{p['hwid']}]" if p["hwid"] and p["hwid"] != "n/a" else ""
        print(f"  {p['device']}{extra}{hwid}")
    if not ports:
        print("  (none found)")
    if not args.no_visa:
        print(f"VISA resources (library {args.visa_library!r}, for [detector] resource):")
        for r in visa:
            print(f"  {r}")
        if problem:
            print(f"  (could not ask the VISA library: {problem})")
        elif not visa:
            print("  (none found)")
    print("Pseudo-terminals (emulators) are not listed; use the path the emulator prints.")
    return 0
