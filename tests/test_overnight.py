"""Unattended runs: kill -9 and resume, SIGINT/SIGTERM stops, a finished run refuses resume."""
import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACE = "sweep.settle_s=0.0015"   # the default rig paced by its own settle time


def _sweep(*args, **kw):
    return subprocess.Popen([sys.executable, "-m", "daq", "sweep", *args], cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **kw)


def _samples_in(log: Path) -> int:
    if not log.exists():
        return 0
    try:
        con = sqlite3.connect(f"file:{log}?mode=ro", uri=True, timeout=5)
        n = con.execute("SELECT COALESCE(SUM(n), 0) FROM sample_blocks").fetchone()[0]
        con.close()
        return int(n)
    except sqlite3.DatabaseError:
        return 0


def _wait_for_samples(log: Path, n: int, proc, timeout_s: float = 60) -> None:
    deadline = time.time() + timeout_s
    while _samples_in(log) < n:
        assert proc.poll() is None, proc.communicate()
        assert time.time() < deadline, "sweep did not log samples in time"
        time.sleep(0.1)


def test_kill_9_then_resume_matches_an_uninterrupted_run(tmp_path):
    full = subprocess.run([sys.executable, "-m", "daq", "sweep", "--log", str(tmp_path / "full.db"),
                           "--json", "--set", "sweep.settle_s=0"], cwd=ROOT,
                          capture_output=True, text=True, timeout=120)
    assert full.returncode == 0, full.stderr
    want = json.loads(full.stdout)

    log = tmp_path / "killed.db"
    proc = _sweep("--log", str(log), "--json", "--set", PACE)
    _wait_for_samples(log, 2500, proc)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=10)
    con = sqlite3.connect(log)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"   # SQLite's own check
    assert con.execute("SELECT value FROM meta WHERE key='status'").fetchone()[0] == "running"
    con.close()
    kept = _samples_in(log)
    assert 2500 <= kept < want["samples"]

    res = subprocess.run([sys.executable, "-m", "daq", "sweep", "--resume", str(log), "--json"],
                         cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    got = json.loads(res.stdout)
    assert got["status"] == "finished"
    assert got["samples"] == want["samples"]
    assert abs(got["modes"] - want["modes"]) <= 1
    assert abs(got["modes"] - got["truth"]["modes"]) <= 1
    con = sqlite3.connect(log)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    # Resuming a finished run is refused and changes nothing.
    again = subprocess.run([sys.executable, "-m", "daq", "sweep", "--resume", str(log)],
                           cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert again.returncode == 2 and "already complete" in again.stderr


def _stop_with(sig, tmp_path):
    log = tmp_path / f"stop{int(sig)}.db"
    proc = _sweep("--log", str(log), "--json", "--set", PACE)
    _wait_for_samples(log, 1500, proc)
    proc.send_signal(sig)
    out, err = proc.communicate(timeout=30)
    return proc.returncode, out, err, log


def test_sigint_exits_130_and_leaves_a_log_analyze_reads(tmp_path):
    code, out, err, log = _stop_with(signal.SIGINT, tmp_path)
    assert code == 130, err
    summary = json.loads(out)
    assert summary["status"] == "stopped" and summary["samples"] >= 1500
    ana = subprocess.run([sys.executable, "-m", "daq", "analyze", str(log), "--json"], cwd=ROOT,
                         capture_output=True, text=True, timeout=60)
    assert ana.returncode == 0, ana.stderr
    assert json.loads(ana.stdout)["samples"] == summary["samples"]


def test_sigterm_exits_143(tmp_path):
    code, out, err, log = _stop_with(signal.SIGTERM, tmp_path)
    assert code == 143, err
    assert json.loads(out)["status"] == "stopped"


def test_second_interrupt_aborts_with_a_consistent_log(tmp_path):
    # Two Ctrl-C in quick succession: exit 130 and a log whose samples are exactly a prefix
    # of the schedule (none lost, none written twice), which SQLite checks as sound.
    from daq.rig import load_rig
    from daq.runlog import RunLog
    from daq.schedule import moves
    log = tmp_path / "abort.db"
    proc = _sweep("--log", str(log), "--json", "--set", PACE)
    _wait_for_samples(log, 1200, proc)
    proc.send_signal(signal.SIGINT)
    time.sleep(0.002)
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 130, err
    assert "Traceback" not in err
    con = sqlite3.connect(log)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    con.close()
    s = RunLog.open(log).read_samples()
    want = [m.target_steps for m in moves(load_rig(None)["sweep"]) if m.record][: len(s)]
    assert s.position_steps.tolist() == want and len(s) >= 1200


@pytest.mark.parametrize("gap_s", [0.05, 0.3, 0.8])
def test_second_interrupt_at_human_pace_still_closes_the_log(tmp_path, gap_s):
    # A person presses Ctrl-C twice a tenth of a second or more apart: the second one
    # may land while the motion stops or while the offline summary runs. Either way:
    # exit 130, no traceback, and a finished-off log (status and summary written).
    from daq.runlog import RunLog
    log = tmp_path / "twice.db"
    proc = _sweep("--log", str(log), "--json", "--set", PACE)
    _wait_for_samples(log, 1200, proc)
    proc.send_signal(signal.SIGINT)
    time.sleep(gap_s)
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 130, err
    assert "Traceback" not in err
    back = RunLog.open(log)
    assert back.meta("status") in ("stopped", "aborted")
    assert back.meta("ended_utc") and back.summary().get("samples") == back.n_samples
    con = sqlite3.connect(log)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


def test_resume_refuses_overrides_but_where_devices_are_plugged_in(tmp_path):
    from daq.rig import load_rig
    from daq.runlog import RunLog
    log = tmp_path / "x.db"
    RunLog.create(log, load_rig(Path(ROOT, "configs", "serial-ascii.toml"))).close()
    r = subprocess.run([sys.executable, "-m", "daq", "sweep", "--resume", str(log),
                        "--set", "sweep.step=2"], cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "only where a device is" in r.stderr and "stage.port" in r.stderr
    # a new port is taken (here one that does not exist: the open fails, exit 1, a clear reason)
    r = subprocess.run([sys.executable, "-m", "daq", "sweep", "--resume", str(log),
                        "--set", "stage.port=/dev/modetick-no-such-port"], cwd=ROOT,
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 1 and "/dev/modetick-no-such-port" in r.stderr, r.stderr


def test_stop_then_resume_logs_every_event_once(tmp_path):
    # A run stopped with SIGINT logs the counter's last (provisional) events; the resumed
    # run's counter, restored from before them, counts them again. The log must end as an
    # uninterrupted run's would: every blip once, one event per pass, and a replay of it
    # that finds the same blips (none "lost" to duplicates).
    log = tmp_path / "stopped.db"
    proc = _sweep("--log", str(log), "--json", "--set", PACE, "--set", "sweep.passes=3")
    _wait_for_samples(log, 2500, proc)
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 130, err
    res = subprocess.run([sys.executable, "-m", "daq", "sweep", "--resume", str(log), "--json"],
                         cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    got = json.loads(res.stdout)
    con = sqlite3.connect(log)
    blips = con.execute("SELECT i FROM events WHERE kind='blip'").fetchall()
    assert len(blips) == len(set(blips)) == got["crossings"]
    assert con.execute("SELECT COUNT(*) FROM events WHERE kind='pass'").fetchone()[0] == 3
    reversals = con.execute("SELECT i FROM events WHERE kind='reversal'").fetchall()
    assert len(reversals) == len(set(reversals)) == 2
    con.close()
    rep = subprocess.run([sys.executable, "-m", "daq", "replay", str(log), "--fast", "--json"],
                         cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert rep.returncode == 0, rep.stderr
    ch = json.loads(rep.stdout)["changes"]
    assert ch["identical"], ch


def test_a_stopped_run_says_how_to_go_on(tmp_path):
    log = tmp_path / "plain.db"
    proc = _sweep("--log", str(log), "--plain", "--set", PACE)
    _wait_for_samples(log, 1000, proc)
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 130, err
    assert f"to go on: modetick sweep --resume {log}" in " ".join(out.split())
    assert "modes counted" in out and "status" in out
