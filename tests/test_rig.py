"""Rig-file loader: valid rigs load with defaults, bad ones fail with one clear line."""
import subprocess
import sys
from pathlib import Path

import pytest

from daq.rig import RigError, default_rig_path, load_rig, parse_rig

ROOT = Path(__file__).resolve().parent.parent

MINIMAL = """
[sweep]
start = 0
stop = 100
step = 2
"""


def test_default_rig_loads_and_is_calibrated():
    rig = load_rig()
    assert rig.source == str(default_rig_path())
    assert rig.calibrated()
    assert rig["stage"]["driver"] == "sim"
    assert rig["sweep"]["step"] > 0


def test_minimal_rig_gets_defaults():
    rig = parse_rig(MINIMAL)
    assert rig["sweep"]["passes"] == 1
    assert rig["sweep"]["settle_s"] == 0.0
    assert rig["grating"]["order"] == 1
    assert not rig.calibrated()


def test_overrides_apply_and_are_typed():
    rig = parse_rig(MINIMAL, overrides=["sweep.passes=3", "sweep.settle_s=0.5", "stage.min_steps=-10"])
    assert rig["sweep"]["passes"] == 3 and rig["sweep"]["settle_s"] == 0.5
    assert rig.overrides == ["sweep.passes=3", "sweep.settle_s=0.5", "stage.min_steps=-10"]


@pytest.mark.parametrize("text, overrides, fragment", [
    ("[sweep]\nstart = 0\nstop = 100\n", [], "[sweep] step: is required"),
    (MINIMAL, ["sweep.step=0"], "[sweep] step: must be a positive"),
    (MINIMAL, ["sweep.step=-3"], "[sweep] step: must be a positive"),
    (MINIMAL, ["sweep.settle_s=-1"], "[sweep] settle_s: must not be negative"),
    (MINIMAL, ["sweep.stop=0"], "[sweep] stop: equals start"),
    (MINIMAL, ["sweep.setle_s=1"], "did you mean 'settle_s'"),
    (MINIMAL, ["sweep.step=\"two\""], "[sweep] step: must be an integer"),
    (MINIMAL, ["sweep.step=2.5"], "[sweep] step: must be an integer"),
    (MINIMAL, ["stage.max_steps=50"], "beyond [stage] max_steps = 50"),
    (MINIMAL, ["stage.min_steps=10"], "below [stage] min_steps = 10"),
    (MINIMAL, ["stage.driver=\"warp-drive\""], "unknown driver 'warp-drive'"),
    (MINIMAL, ["grating.order=0"], "[grating] order"),
    (MINIMAL, ["chip.group_index=0.5"], "[chip] group_index"),
    (MINIMAL + "[stgae]\nx = 1\n", [], "did you mean [stage]"),
    (MINIMAL, ["sweep.mode=\"scan\""], "speed_steps_per_s"),
    (MINIMAL, ["nodot=3"], "expected SECTION.KEY=VALUE"),
    ("[sweep\nstart = 0\n", [], "TOML syntax error"),
])
def test_bad_rigs_name_the_key(text, overrides, fragment):
    with pytest.raises(RigError) as exc:
        parse_rig(text, "bench.toml", overrides)
    msg = str(exc.value)
    assert fragment in msg
    assert msg.startswith("rig file bench.toml: ")
    assert "\n" not in msg


def test_missing_file():
    with pytest.raises(RigError, match="no such file"):
        load_rig("/nonexistent/rig.toml")


def test_broken_rig_file_exits_2_with_one_line_from_cli(tmp_path):
    bad = tmp_path / "broken.toml"
    bad.write_text("[sweep]\nstart = = 3\n")
    out = subprocess.run([sys.executable, "-m", "daq", "sweep", "--config", str(bad), "--json"],
                         cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert out.returncode == 2
    lines = out.stderr.strip().splitlines()
    assert 1 <= len(lines) <= 3
    assert "broken.toml" in lines[0] and "Traceback" not in out.stderr
    assert out.stdout == ""


@pytest.mark.parametrize("path", sorted((ROOT / "configs").glob("*.toml")), ids=lambda p: p.name)
def test_every_example_rig_file_is_valid(path, tmp_path):
    # Each shipped example must pass the loader as it is (ports are only opened later);
    # the replay example names a log, which must exist: give it a small real one.
    overrides = []
    if 'driver = "replay"' in path.read_text():
        from daq.runlog import RunLog
        small = tmp_path / "small.db"
        log = RunLog.create(small, parse_rig(MINIMAL))
        log.append_samples([0.0, 0.1, 0.2], [0, 1, 2], [1, 1, 1], [0, 0, 0], [0.1, 0.2, 0.1])
        log.close()
        overrides = [f"detector.log={small}"]
    rig = load_rig(path, overrides)
    assert rig["sweep"]["step"] > 0


def test_an_error_from_a_set_item_names_it():
    # the file is fine; the user's --set item is what to fix
    with pytest.raises(RigError, match=r"unknown key .*given by --set sweep.pases=3"):
        load_rig(None, ["sweep.pases=3"])
    with pytest.raises(RigError, match=r"must be an integer.*given by --set sweep.passes=x"):
        load_rig(None, ["sweep.passes=x"])
    with pytest.raises(RigError, match=r"positive number of steps.*given by --set sweep.step=0"):
        load_rig(None, ["sweep.step=0"])
    with pytest.raises(RigError) as exc:
        parse_rig("[sweep]\nstart = 0\nstop = 10\nstep = 1\npases = 2\n")
    assert "--set" not in str(exc.value)


def test_a_resume_may_move_a_device_but_not_change_the_data():
    from daq.rig import reconnect
    cam = load_rig(Path(default_rig_path()).parent / "camera.toml")
    assert reconnect(cam, ["detector.source=1"])["detector"]["source"] == "1"     # re-enumerated
    assert reconnect(cam, ["detector.source=/dev/video2"])["detector"]["source"] == "/dev/video2"
    with pytest.raises(RigError, match="not from or to a video file"):
        reconnect(cam, ["detector.source=/tmp/another-night.mp4"])
    ser = load_rig(Path(default_rig_path()).parent / "serial-ascii.toml")
    assert reconnect(ser, ["stage.port=/dev/ttyUSB3"])["stage"]["port"] == "/dev/ttyUSB3"
    for item in ("aux.resource=ASRL/dev/ttyUSB4::INSTR",   # not used by this run: would add data
                 "sweep.step=2", "chip.group_index=3.7"):
        with pytest.raises(RigError, match="only where a device is connected may change"):
            reconnect(ser, [item])
