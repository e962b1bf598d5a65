"""`modetick ports`, `modetick check` and a whole sweep through real drivers, as subprocesses.

The emulators run as a separate process (``python -m sims.emulators``), the
CLI as another, so nothing is shared but the pseudo-terminals, as on a bench.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from daq.cli import main
from sims.emulators import PhotodiodeMeter, StepperProtocol, start_instrument, start_stepper, visa_resource
from sims.emulators.physics import CombPhysics, LockedPhysics

ROOT = Path(__file__).resolve().parent.parent
ENV = {**os.environ, "PYTHONPATH": str(ROOT)}
EMULATED = ROOT / "configs" / "emulated.toml"


def modetick(*args, timeout=60):
    return subprocess.run([sys.executable, "-m", "daq", *args], cwd=ROOT, env=ENV,
                          capture_output=True, text=True, timeout=timeout)


class EmulatorProcess:
    """``python -m sims.emulators ...`` in its own process; ``info`` is its JSON line."""

    def __init__(self, *args):
        self.proc = subprocess.Popen([sys.executable, "-m", "sims.emulators", *args], cwd=ROOT, env=ENV,
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        line = self.proc.stdout.readline()
        if not line:
            raise RuntimeError(f"emulator did not start: {self.proc.stderr.read()}")
        self.info = json.loads(line)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.proc.terminate()
        self.proc.wait(timeout=10)


def test_ports_lists_serial_and_visa():
    r = modetick("ports", "--json")
    assert r.returncode == 0, r.stderr
    data = json.loads(r.stdout)
    assert isinstance(data["serial"], list) and data["visa"]["library"] == "@py"
    r = modetick("ports", "--no-visa")
    assert r.returncode == 0 and r.stdout.startswith("Serial ports")


def test_check_identifies_reads_and_moves_nothing(capsys):
    raw = CombPhysics()
    physics = LockedPhysics(raw)
    stepper, ctl = start_stepper(physics, StepperProtocol(start_steps=1500))
    meter = start_instrument(PhotodiodeMeter(physics))
    try:
        code = main(["check", str(EMULATED), "--set", f"stage.port={stepper.path}",
                     "--set", f"detector.resource={visa_resource(meter)}"])
        out = capsys.readouterr().out
    finally:
        stepper.close()
        meter.close()
    assert code == 0
    assert "EMU-STEP" in out and "PDM-100" in out and "at 1500 steps" in out
    assert f"one reading: {raw.value_at(1500):.6g}" in out
    assert ctl.motion.moves == 0 and raw.path == [1500]     # nothing moved


def test_check_against_an_emulator_process():
    with EmulatorProcess("--rig", str(EMULATED), "--stepper", "--meter") as emu:
        r = modetick("check", str(EMULATED), "--json", "--set", f"stage.port={emu.info['stepper']}",
                     "--set", f"detector.resource={emu.info['meter_resource']}")
    assert r.returncode == 0, r.stderr
    found = json.loads(r.stdout)
    assert found["stage"]["position_steps"] == 0 and "EMU-STEP" in found["stage"]["identity"]
    assert found["detector"]["identity"].startswith("Modetick Emulated, PDM-100")
    assert found["problems"] == []


@pytest.mark.parametrize("which, value, named", [
    ("stage.port", "/dev/ttyNOSUCH4", "/dev/ttyNOSUCH4"),
    ("detector.resource", "ASRL/dev/ttyNOSUCH5::INSTR", "ASRL/dev/ttyNOSUCH5::INSTR"),
])
def test_missing_port_is_one_line_and_exit_1(which, value, named, tmp_path):
    with EmulatorProcess("--rig", str(EMULATED), "--stepper", "--meter") as emu:
        sets = {"stage.port": emu.info["stepper"], "detector.resource": emu.info["meter_resource"]}
        sets[which] = value
        args = [a for k, v in sets.items() for a in ("--set", f"{k}={v}")]
        for cmd in (["check", str(EMULATED)],
                    ["sweep", "--config", str(EMULATED), "--json", "--log", str(tmp_path / "run.db")]):
            r = modetick(*cmd, *args)
            assert r.returncode == 1, (cmd, r.stdout, r.stderr)
            lines = r.stderr.strip().splitlines()
            assert len(lines) == 1 and named in lines[0] and "Traceback" not in r.stderr
            assert r.stdout.strip() == "" or "modes" not in r.stdout
