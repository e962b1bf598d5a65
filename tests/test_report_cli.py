"""`modetick report` on real simulated run logs, made through the CLI like a user would.

The main log and its report go through a real subprocess; the other cases call the
same CLI entry point in-process (daq.cli.main), which spares a Python start-up and
the imports per case.
"""
import json
import math
import sqlite3
import subprocess
import sys
from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pytest

from daq.cli import main

ROOT = Path(__file__).resolve().parent.parent
# A short sweep of the simulated rig: a few dozen modes, both directions.
SHORT = ["--set", "sweep.settle_s=0", "--set", "sweep.start=1000", "--set", "sweep.stop=2600"]
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"   # PNG specification (W3C / ISO/IEC 15948), section 5.2


def modetick(*args):
    """The installed-style command in a subprocess; returns the completed process."""
    r = subprocess.run([sys.executable, "-m", "daq", *map(str, args)], cwd=ROOT,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    return r


def cli(capsys, *args):
    """(exit code, stdout, stderr) of daq.cli.main in this process."""
    capsys.readouterr()
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture(scope="module")
def two_pass_log(tmp_path_factory):
    path = tmp_path_factory.mktemp("two") / "run.db"
    modetick("sweep", "--log", path, "--json", *SHORT)
    return path


@pytest.fixture(scope="module")
def two_pass_report(two_pass_log):
    out = two_pass_log.parent / "report"
    r = modetick("report", two_pass_log, "--out", out)
    return out, r


def test_report_writes_figures_that_open_as_images(two_pass_report):
    out, r = two_pass_report
    pngs = sorted(out.glob("*.png"))
    assert {"trace.png", "trace-detail.png", "fit.png", "spacings.png", "backlash.png",
            "budget.png"} <= {p.name for p in pngs}
    for p in pngs:
        assert p.read_bytes()[:8] == PNG_SIGNATURE, p
        img = mpimg.imread(p)                       # matplotlib's own PNG reader
        h, w = img.shape[:2]
        assert w >= 600 and h >= 300 and img.shape[2] in (3, 4), (p, img.shape)
        assert img[..., :3].std() > 0.01, f"{p} is blank"
        assert str(p) in r.stdout                   # the command lists what it wrote


def test_summary_equals_analyze_json(capsys, two_pass_log, two_pass_report):
    out, _ = two_pass_report
    summary = json.loads((out / "summary.json").read_text())
    code, stdout, _ = cli(capsys, "analyze", two_pass_log, "--json")
    assert code == 0 and summary == json.loads(stdout)
    assert summary["modes"] >= 10 and summary["length_um"] > 0


def test_markdown_has_numbers_inputs_rig_and_safety(two_pass_report):
    out, _ = two_pass_report
    md = (out / "report.md").read_text()
    s = json.loads((out / "summary.json").read_text())
    assert f"| modes counted | {s['modes']} |" in md
    # Values with their standard uncertainty to two significant digits and the value
    # rounded to match (JCGM 100:2008, 7.2.6).
    for key, unit in (("spacing_steps", "steps"), ("spacing_nm", "nm"), ("length_um", "\u00b5m")):
        v, u = s[key], s[f"{key}_u"]
        d = max(1 - math.floor(math.log10(u)), 0)
        assert f"| {v:.{d}f} {unit} | {u:.{d}f} {unit} |" in md, key
    for key in ("[stage] deg_per_step", "[grating] lines_per_mm", "[chip] group_index"):
        assert key in md
    assert "laser safety officer" in md and "IEC 60825-1" in md
    assert "```toml" in md and "[sweep]" in md
    for p in out.glob("*.png"):
        assert f"]({p.name})" in md


def test_budget_shares_add_up_and_largest_is_named(two_pass_report):
    # GUM law of propagation for uncorrelated inputs (JCGM 100:2008, 5.1.2):
    # u_c^2 = sum of the squared contributions, so the shares of the variance sum to 1.
    out, _ = two_pass_report
    s = json.loads((out / "summary.json").read_text())
    contrib = np.array([b["contribution"] for b in s["budget"]])
    assert math.isclose(math.sqrt(np.sum(contrib ** 2)), s["length_um_u"], rel_tol=1e-9)
    top = max(s["budget"], key=lambda b: b["contribution"])
    assert f"| {top['input']} |" in (out / "report.md").read_text()


def test_one_pass_log_has_no_backlash_figure_and_says_so(capsys, tmp_path):
    log = tmp_path / "one.db"
    assert cli(capsys, "sweep", "--log", log, "--json", *SHORT, "--set", "sweep.passes=1")[0] == 0
    code, out, _ = cli(capsys, "report", log, "--out", tmp_path / "rep")
    names = {p.name for p in (tmp_path / "rep").glob("*.png")}
    assert code == 0
    assert "backlash.png" not in names and {"trace.png", "fit.png", "spacings.png"} <= names
    assert "one way only" in out
    assert "one way only" in (tmp_path / "rep" / "report.md").read_text()


def test_uncalibrated_rig_has_no_nm_and_says_so(capsys, tmp_path, two_pass_log):
    # The same log read with a rig that has no actuator calibration.
    rig = (ROOT / "configs" / "sim.toml").read_text()
    uncal = "\n".join(l for l in rig.splitlines()
                      if not l.split("=")[0].strip().startswith(("deg_per_step", "angle_at_zero_deg")))
    (tmp_path / "uncal.toml").write_text(uncal)
    code, out, _ = cli(capsys, "report", two_pass_log, "--out", tmp_path / "rep",
                       "--config", tmp_path / "uncal.toml")
    md = (tmp_path / "rep" / "report.md").read_text()
    s = json.loads((tmp_path / "rep" / "summary.json").read_text())
    assert code == 0 and s["length_um"] is None and s["spacing_nm"] is None
    assert "No calibration" in md and "no nm figures" in out
    assert " nm |" not in md and "\u00b5m |" not in md
    assert not (tmp_path / "rep" / "budget.png").exists()
    assert (tmp_path / "rep" / "trace.png").is_file() and (tmp_path / "rep" / "fit.png").is_file()


@pytest.mark.parametrize("content", [b"", b"position,intensity\n1,2\n", b"not a database at all",
                                     b"SQLite format 3\x00" + b"\x00" * 80])
def test_not_a_run_log_exits_2_with_one_line(capsys, tmp_path, content):
    bad = tmp_path / "bad.db"
    bad.write_bytes(content)
    code, _, err = cli(capsys, "report", bad, "--out", tmp_path / "rep")
    assert code == 2
    assert len(err.strip().splitlines()) == 1 and err.startswith("modetick: ")
    assert not (tmp_path / "rep").exists()


def test_other_sqlite_file_and_missing_file_exit_2(capsys, tmp_path):
    other = tmp_path / "other.db"
    con = sqlite3.connect(other)
    con.execute("CREATE TABLE meta (key TEXT, value TEXT)")
    con.execute("INSERT INTO meta VALUES ('format', 'somebody-elses')")
    con.commit()
    con.close()
    for path in (other, tmp_path / "missing.db"):
        code, _, err = cli(capsys, "report", path)
        assert code == 2 and len(err.strip().splitlines()) == 1, err


@pytest.fixture(scope="module")
def rough_log(tmp_path_factory):
    # A bad night from the simulator's physics (noise, spikes, backlash, kicks, split
    # blips, drift), 48 000 samples = 12 passes of 1000..5000 steps.
    path = tmp_path_factory.mktemp("rough") / "rough.db"
    assert main(["simulate", "--out", str(path), "--samples", "48000", "--set", 'sim.scenario="rough"']) == 0
    return path


def test_rough_many_pass_log(capsys, tmp_path, rough_log):
    from daq.report import fit_residuals, open_analyzed
    code, out, _ = cli(capsys, "report", rough_log, "--out", tmp_path / "rep")
    assert code == 0
    names = {p.name for p in (tmp_path / "rep").glob("*.png")}
    assert {"trace.png", "passes.png", "backlash.png", "budget.png"} <= names
    assert "passes 1, 2, 11, 12 of 12" in out
    a = open_analyzed(str(rough_log))
    try:
        fit = a.result["fit"]
        k, c, res, left_out = fit_residuals(a.result)
        # The centres the figure shows as left out are those the analysis dropped: the rms
        # of the rest is the analysis's own residual rms.
        assert left_out.sum() == fit["outliers"]
        assert math.isclose(float(np.sqrt(np.mean(res[~left_out] ** 2))), fit["residual_rms_steps"], rel_tol=1e-6)
        # The rough scenario's mount has a 30-step dead band (sims/scenarios.py): the up
        # and down centres the backlash figure compares sit about that far apart.
        from daq.report import backlash_offsets
        modes, off = backlash_offsets(a.result)
        assert modes.size > 50 and 20 < np.median(off) < 40
    finally:
        a.log.close()


def test_log_without_blips_gives_a_trace_and_says_why_the_rest_is_missing(capsys, tmp_path):
    # Laser below threshold all night: a flat, noisy trace through the real run log.
    from daq.rig import load_rig
    from daq.runlog import RunLog
    rng = np.random.default_rng(11)
    log = RunLog.create(tmp_path / "dark.db", load_rig(None, ["sweep.start=0", "sweep.stop=1999"]))
    pos = np.arange(2000)
    log.append_samples(pos * 1e-3, pos, np.ones(2000), np.zeros(2000), 0.3 + rng.normal(0, 0.002, 2000))
    log.finish("finished")
    log.close()
    code, out, _ = cli(capsys, "report", tmp_path / "dark.db", "--out", tmp_path / "rep")
    assert code == 0
    assert {p.name for p in (tmp_path / "rep").glob("*.png")} == {"trace.png"}
    assert "Too few modes for a fit" in out and "one way only" in out
    s = json.loads((tmp_path / "rep" / "summary.json").read_text())
    assert s["modes"] == 0 and s["spacing_steps"] is None


def test_analyze_prints_the_budget_with_its_rig_keys_whole(tmp_path):
    # "[chip] group_index" names a rig key: it must not be eaten as a style tag
    log = tmp_path / "b.db"
    r = subprocess.run([sys.executable, "-m", "daq", "sweep", "--log", str(log), "--json", "--set",
                        "sweep.settle_s=0"], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    r = subprocess.run([sys.executable, "-m", "daq", "analyze", str(log)], cwd=ROOT,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0 and "[chip] group_index" in r.stdout and "[stage] deg_per_step" in r.stdout
