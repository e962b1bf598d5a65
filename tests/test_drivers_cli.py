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
# The example rig waits 0.5 s for a reply; a loaded CI machine can stall that long, and
# a retried exchange may then read the reply to the one before. Replies are due here, and
# a longer wait costs nothing while they come.
DUE_S = 2.0
DUE = [f"stage.timeout_s={DUE_S}", f"detector.timeout_s={DUE_S}"]


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
                     "--set", f"detector.resource={visa_resource(meter)}", *sets(DUE)])
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
                     "--set", f"detector.resource={emu.info['meter_resource']}", *sets(DUE))
    assert r.returncode == 0, r.stderr
    found = json.loads(r.stdout)
    # the simulated bench powers up at its sweep's start, and the controller reports that
    assert found["stage"]["position_steps"] == 1000 and "EMU-STEP" in found["stage"]["identity"]
    assert found["detector"]["identity"].startswith("Modetick Emulated, PDM-100")
    assert found["problems"] == []


def test_missing_port_is_one_line_and_exit_1(tmp_path):
    with EmulatorProcess("--rig", str(EMULATED), "--stepper", "--meter") as emu:
        good = {"stage.port": emu.info["stepper"], "detector.resource": emu.info["meter_resource"]}
        for cmd, which, value in (
                (["check", str(EMULATED)], "stage.port", "/dev/ttyNOSUCH4"),
                (["sweep", "--config", str(EMULATED), "--json", "--log", str(tmp_path / "run.db")],
                 "detector.resource", "ASRL/dev/ttyNOSUCH5::INSTR")):
            sets = {**good, which: value}
            r = modetick(*cmd, *[a for k, v in sets.items() for a in ("--set", f"{k}={v}")])
            assert r.returncode == 1, (cmd, r.stdout, r.stderr)
            lines = r.stderr.strip().splitlines()
            assert len(lines) == 1 and value in lines[0] and "Traceback" not in r.stderr
            assert r.stdout.strip() == ""


# -- whole sweeps: `modetick sweep --json` against the emulator process ------------------

UNSEEN = {"eol_in": "\r\n", "eol_out": "\r\n", "move_abs": "$GO,{steps}", "ack": "$ACK",
          "query_position": "$POS", "position_reply": "$POS,{steps}", "busy_query": "$STA",
          "busy_reply": "$STA,RUN", "idle_reply": "$STA,RDY", "stop": "$HLT",
          "identify_query": "$VER", "identify_reply": "$VER,KX-12 fw 4.0", "set_speed": None,
          "error_reply": "$NAK", "speed_steps_per_s": 30000.0}

HELD_OUT_RIG = """
# A controller with its own protocol and a SCPI meter on a serial line, both on ptys.
[stage]
driver = "serial-ascii"
port = "{stepper}"
eol = "\\r\\n"
move_abs = "$GO,{{steps}}"
ack_reply = '\\$ACK'
query_position = "$POS"
position_reply = '\\$POS,(?P<steps>-?\\d+)'
busy_query = "$STA"
idle_reply = '\\$STA,RDY'
busy_reply = '\\$STA,RUN'
stop_command = "$HLT"
identify_query = "$VER"
timeout_s = 2.0                # DUE_S: every reply is due
min_steps = 0
max_steps = 20000
deg_per_step = 2.0e-4
angle_at_zero_deg = 44.0

[detector]
driver = "visa-scpi"
resource = "{meter}"
query = "READ?"
timeout_s = 2.0                # DUE_S

[sweep]
# Both ends midway between two chip modes: a blip cut in half by an end of the
# sweep is a judgement call that this test of the drivers should not depend on.
start = 1217
stop = 2612
step = 1
passes = 2

[grating]
lines_per_mm = 1500.0

[chip]
group_index = 3.62
group_index_u = 0.05

[sim]
scenario = "backlash"
seed = 3
"""


def sets(overrides) -> list[str]:
    return [a for s in overrides for a in ("--set", s)]


def run_sweep(rig: Path, log: Path, *overrides):
    return modetick("sweep", "--config", str(rig), "--json", "--log", str(log), *sets(overrides), timeout=120)


def test_held_out_bench_two_pass_sweep_matches_truth(tmp_path):
    # The physics needs only [sim]/[stage]/[sweep]: give the emulator the rig with placeholder ports.
    rig = tmp_path / "bench.toml"
    rig.write_text(HELD_OUT_RIG.format(stepper="/dev/null", meter="ASRL/dev/null::INSTR"))
    with EmulatorProcess("--rig", str(rig), "--stepper-protocol", json.dumps(UNSEEN), "--meter") as emu:
        rig.write_text(HELD_OUT_RIG.format(stepper=emu.info["stepper"], meter=emu.info["meter_resource"]))
        r = run_sweep(rig, tmp_path / "run.db")
    assert r.returncode == 0, r.stderr
    summary, truth = json.loads(r.stdout), emu.info["truth"]
    # two passes over 1217..2612; the turning point is sampled once
    assert summary["status"] == "finished" and summary["samples"] == 2 * 1396 - 1
    assert summary["modes"] == truth["modes"] >= 25
    # the simulated mount has a 35-step dead band ("backlash" scenario): seen through the drivers too
    assert summary["backlash_steps"] == pytest.approx(35.0, abs=2.0)
    assert summary["spacing_steps"] == pytest.approx(truth["spacing_steps"], rel=0.005)


def test_sweep_rides_through_transient_faults(tmp_path):
    # A few replies in a thousand garbled or late on both devices: retried, same count.
    # Late by half a second more than the stage's timeout, so that a stall cannot make
    # one look on time; the meter's replies are only garbled, and are due.
    with EmulatorProcess("--rig", str(EMULATED), "--stepper", "--meter", "--late-s", "1.5",
                         "--fault", "stepper:rate_garble=0.01", "--fault", "stepper:rate_late=0.0005",
                         "--fault", "meter:rate_garble=0.01") as emu:
        r = run_sweep(EMULATED, tmp_path / "run.db", f"stage.port={emu.info['stepper']}",
                      f"detector.resource={emu.info['meter_resource']}",
                      "stage.timeout_s=1.0", f"detector.timeout_s={DUE_S}")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["modes"] == emu.info["truth"]["modes"] >= 15


def test_cable_pulled_mid_sweep_stops_with_one_line_and_keeps_the_log(tmp_path):
    from daq.runlog import RunLog

    with EmulatorProcess("--rig", str(EMULATED), "--stepper", "--meter",
                         "--close-after", "stepper:3000") as emu:
        r = run_sweep(EMULATED, tmp_path / "run.db", f"stage.port={emu.info['stepper']}",
                      f"detector.resource={emu.info['meter_resource']}", *DUE)
    assert r.returncode == 1
    last = r.stderr.strip().splitlines()[-1]
    assert "cable pulled" in last and emu.info["stepper"] in last and "Traceback" not in r.stderr
    log = RunLog.open(tmp_path / "run.db")
    assert log.meta("status") == "faulted" and "cable pulled" in log.meta("reason")
    assert 500 < log.n_samples < 2773       # every sample up to the fault was kept
    log.close()


def test_after_a_pulled_cable_the_run_resumes_on_new_ports(tmp_path):
    # The adapters come back under other names (a new pair of ptys): `--resume LOG --set
    # stage.port=... --set detector.resource=...` finishes the run; the count is the
    # emulator's truth and the log holds every blip once.
    import sqlite3
    log = tmp_path / "run.db"
    with EmulatorProcess("--rig", str(EMULATED), "--stepper", "--meter",
                         "--close-after", "stepper:3000") as emu:
        r = run_sweep(EMULATED, log, f"stage.port={emu.info['stepper']}",
                      f"detector.resource={emu.info['meter_resource']}", *DUE)
    assert r.returncode == 1, r.stderr
    # a first try on the new ports fails at once (the cable again, before the run restarts):
    # that must not make the stop's last events permanent
    with EmulatorProcess("--rig", str(EMULATED), "--stepper", "--meter",
                         "--close-after", "stepper:1") as emu1:
        r = modetick("sweep", "--resume", str(log), "--json", *sets([
            f"stage.port={emu1.info['stepper']}", f"detector.resource={emu1.info['meter_resource']}"]),
            timeout=120)
    assert r.returncode == 1, r.stderr
    with EmulatorProcess("--rig", str(EMULATED), "--stepper", "--meter") as emu2:
        r = modetick("sweep", "--resume", str(log), "--json", *sets([
            f"stage.port={emu2.info['stepper']}", f"detector.resource={emu2.info['meter_resource']}"]),
            timeout=120)
    assert r.returncode == 0, r.stderr
    summary = json.loads(r.stdout)
    assert summary["status"] == "finished"
    assert abs(summary["modes"] - emu2.info["truth"]["modes"]) <= 1
    con = sqlite3.connect(log)
    blips = con.execute("SELECT i FROM events WHERE kind='blip'").fetchall()
    assert len(blips) == len(set(blips)) == summary["crossings"]
    stored = json.loads(con.execute("SELECT value FROM meta WHERE key='rig_json'").fetchone()[0])
    assert stored["sections"]["stage"]["port"] == emu2.info["stepper"]
    con.close()


def test_continuous_scan_through_the_real_drivers(tmp_path):
    # [sweep] mode = "scan": one move per pass at constant speed (the rig's speed_command),
    # the meter read as fast as it answers, positions from the controller's reports.
    # At 300 steps/s a 7.6-step blip lasts 25 ms, every step is read a few times, and a
    # 90 ms stall skips 27 steps of one pass; at 2000 steps/s a loaded machine's stalls
    # skipped the same blip on both passes (15 modes of 16).
    short = "sweep.stop=1710"
    with EmulatorProcess("--rig", str(EMULATED), "--set", short, "--stepper", "--meter") as emu:
        r = run_sweep(EMULATED, tmp_path / "run.db", f"stage.port={emu.info['stepper']}",
                      f"detector.resource={emu.info['meter_resource']}", short,
                      "sweep.mode=scan", "sweep.speed_steps_per_s=300", *DUE)
    assert r.returncode == 0, r.stderr
    summary = json.loads(r.stdout)
    assert summary["modes"] == emu.info["truth"]["modes"] >= 15
    assert summary["spacing_steps"] == pytest.approx(emu.info["truth"]["spacing_steps"], rel=0.005)
