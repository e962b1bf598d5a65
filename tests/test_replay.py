"""``modetick replay`` through the CLI: same count as the live run, differences, pacing, bad input."""
import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from daq.rig import load_rig
from daq.runlog import RunLog

ROOT = Path(__file__).resolve().parent.parent
ENV = {**os.environ, "PYTHONPATH": str(ROOT)}


def _cli(*args, timeout=60):
    return subprocess.run([sys.executable, "-m", "daq", *map(str, args)], cwd=ROOT, env=ENV,
                          capture_output=True, text=True, timeout=timeout)


def _json(res):
    assert res.returncode == 0, res.stderr
    return json.loads(res.stdout)


@pytest.fixture(scope="module")
def narrow(tmp_path_factory):
    """A live two-pass sweep where the blips fade out at both ends of the gain band."""
    path = tmp_path_factory.mktemp("replay") / "narrow.db"
    live = _json(_cli("sweep", "--log", path, "--json", "--set", "sweep.settle_s=0",
                      "--set", 'sim.scenario="narrowgain"'))
    return path, live


def test_fast_replay_reports_the_live_count(narrow):
    path, live = narrow
    out = _json(_cli("replay", path, "--fast", "--json"))
    for key in ("modes", "crossings", "spacing_steps", "spacing_steps_u", "spacing_nm", "length_um",
                "length_um_u", "samples"):
        assert out[key] == live[key], key
    ch = out["changes"]
    assert ch["identical"] and ch["blips_lost"] == ch["blips_gained"] == 0
    assert ch["modes_lost"] == ch["modes_gained"] == []
    # The count itself against the simulator's truth (its detectability rule, sims/truth.py).
    assert out["truth"] == live["truth"]
    assert abs(out["modes"] - live["truth"]["modes"]) <= 1


def test_other_settings_say_what_changed(narrow):
    path, live = narrow
    out = _json(_cli("replay", path, "--fast", "--json", "--no-refine", "--set", "counter.hi_sigma=120"))
    ch = out["changes"]
    assert out["settings"] == ["counter.hi_sigma=120"]
    assert ch["logged"]["modes"] == live["modes"] and not ch["identical"]
    assert out["modes"] < live["modes"]
    assert ch["blips_lost"] >= len(ch["modes_lost"]) > 0
    # The blips a stricter trigger drops are the weakest ones the live run logged.
    log = RunLog.open(path)
    blips = [e for e in log.events("blip")]
    # Every mode is accounted for: the logged blips' modes, less those lost, plus those gained
    # and those the new numbering splits off, are the modes of the replay.
    logged_modes = len({b["mode"] for b in blips})
    assert out["modes"] == logged_modes - len(ch["modes_lost"]) + len(ch["modes_gained"]) + ch["renumbered"]
    lost_i = {b["i"] for b in ch["lost"]}
    lost_h = [b["height"] for b in blips if b["i"] in lost_i]
    kept_h = [b["height"] for b in blips if b["i"] not in lost_i]
    assert len(lost_h) == ch["blips_lost"]
    assert max(lost_h) < np.median(kept_h)
    # Where: each lost mode's positions are those of logged blips of that mode.
    by_mode = {}
    for b in blips:
        by_mode.setdefault(b["mode"], []).append(round(b["pos"], 2))
    for m in ch["modes_lost"]:
        assert set(m["positions_steps"]) <= set(by_mode[m["mode"]])


def test_new_log_holds_the_same_samples_and_blips(narrow, tmp_path):
    path, live = narrow
    new = tmp_path / "again.db"
    out = _json(_cli("replay", path, "--fast", "--json", "--no-refine", "--log", new))
    a, b = RunLog.open(path), RunLog.open(new)
    sa, sb = a.read_samples(), b.read_samples()
    for col in ("position_steps", "direction", "pass_index", "value", "spread"):
        assert np.array_equal(getattr(sa, col), getattr(sb, col)), col
    assert np.allclose(sa.t_s, sb.t_s, atol=1e-6)
    key = lambda e: (e["i"], e["kind"], e["mode"], round(e["pos"], 6))  # noqa: E731
    assert [key(e) for e in a.events("blip")] == [key(e) for e in b.events("blip")]
    assert b.meta("status") == "finished" and b.meta("replay_of") == str(path)
    assert b.summary()["modes"] == out["modes"] == live["modes"]
    assert _cli("replay", path, "--fast", "--log", new).returncode == 2   # never overwrites


def _paced_log(path: Path, duration_s: float, block: int = 500) -> None:
    """A short log whose samples span duration_s of recorded time."""
    from sims.trace import simulate_trace
    rig = load_rig(None, ["sweep.settle_s=0", "sweep.passes=1"])
    tr = simulate_trace(rig.sections)
    n = tr.value.size
    t = np.linspace(0.0, duration_s, n)
    log = RunLog.create(path, rig)
    for i in range(0, n, block):   # blocks of recorded samples = pacing points
        sl = slice(i, i + block)
        log.append_samples(t[sl], tr.position_steps[sl], tr.direction[sl], tr.pass_index[sl], tr.value[sl])
    log.finish("finished")
    log.close()


@pytest.mark.parametrize("speed, expected_s", [(4.0, 0.8), (8.0, 0.4), (None, 0.0)])
def test_speed_paces_the_replay(tmp_path, speed, expected_s):
    """3.2 s of recorded samples take 3.2 / X s at --speed X (timed here, in process)."""
    from analysis.counter import StreamCounter
    from daq.replay import Replay
    path = tmp_path / "paced.db"
    _paced_log(path, 3.2)
    log = RunLog.open(path)
    rig = log.rig()
    # Untimed warm-up: the counter's first use in a process compiles its kernels (seconds
    # on a fresh machine with no compile cache), which is not the pacing under test.
    Replay(log, rig, StreamCounter(rig["counter"]), speed=None).run()
    t0 = time.monotonic()
    status = Replay(log, rig, StreamCounter(rig["counter"]), speed=speed).run()
    took = time.monotonic() - t0
    assert status == "finished"
    # Slack above: a loaded machine may stall half a second at the end (the replay takes
    # about 10 ms of work). Still below what half the speed (1.6 s for x4), the recorded
    # pace (3.2 s) or, for --fast, pacing at x5 or slower would take.
    assert expected_s - 0.05 <= took <= expected_s + 0.7, took


def test_interrupt_stops_a_paced_replay(tmp_path):
    path = tmp_path / "paced.db"
    _paced_log(path, 20.0, block=100)      # a block every 0.25 s of recorded time
    err_file = tmp_path / "stderr.txt"
    with open(err_file, "w") as err_out:
        p = subprocess.Popen([sys.executable, "-m", "daq", "replay", str(path), "--json", "--no-refine"],
                             cwd=ROOT, env=ENV, stdout=subprocess.PIPE, stderr=err_out, text=True)
    # Interrupt once the replay is under way: its first progress line (every 2 s) shows
    # replayed samples. A fixed sleep could fire before a slow machine got that far.
    deadline = time.monotonic() + 15.0
    while not re.search(r"samples [1-9]\d*/", err_file.read_text()):
        assert p.poll() is None and time.monotonic() < deadline, err_file.read_text()
        time.sleep(0.1)
    p.send_signal(signal.SIGINT)
    out, _ = p.communicate(timeout=20)
    err = err_file.read_text()
    assert p.returncode == 130, err
    res = json.loads(out)
    assert res["status"] == "stopped" and 0 < res["samples_replayed"] < res["samples"]


@pytest.mark.parametrize("args, words", [
    (["--fast"], "not a modetick run log"),
    (["--fast", "--set", "counter.hi_sigmaa=3"], "hi_sigma"),
    (["--fast", "--set", "stage.min_steps=3"], "a replay re-reads the logged samples"),
    (["--fast", "--set", "sweep.passes=3"], "a replay re-reads the logged samples"),
])
def test_bad_input_exits_2_with_one_line(tmp_path, narrow, args, words):
    target = narrow[0]
    if words == "not a modetick run log":
        target = tmp_path / "junk.db"
        target.write_text("position,intensity\n1,2\n")
    res = _cli("replay", target, *args)
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and words in lines[0] and "Traceback" not in res.stderr


def _blocks_log(tmp_path, n_blocks=6, n=500):
    from daq.rig import load_rig
    from daq.runlog import RunLog
    log = RunLog.create(tmp_path / "blocks.db", load_rig(None))
    for b in range(n_blocks):
        i = np.arange(b * n, (b + 1) * n)
        log.append_samples(i * 1e-3, 1000 + i, np.ones(n, int), np.zeros(n, int), np.sin(i * 0.1))
    log.close()
    return tmp_path / "blocks.db"


def test_read_ahead_gives_the_blocks_in_order_then_the_damage(tmp_path):
    # The reader thread's chunks are the log's samples in order; a damaged block is
    # reported (as a LogError naming the log) after every good block before it.
    import sqlite3
    from daq.replay import iter_chunks_ahead
    from daq.runlog import LogError, RunLog
    path = _blocks_log(tmp_path)
    got = np.concatenate([c.position_steps for c in iter_chunks_ahead(RunLog.open(path), max_samples=1200)])
    assert np.array_equal(got, 1000 + np.arange(3000))
    con = sqlite3.connect(path)
    con.execute("UPDATE sample_blocks SET value = X'02' WHERE block = 3")
    con.commit()
    con.close()
    seen = []
    with pytest.raises(LogError, match="damaged sample block"):
        for c in iter_chunks_ahead(RunLog.open(path)):
            seen.append(c.position_steps)
    assert np.array_equal(np.concatenate(seen), 1000 + np.arange(1500))   # blocks 0-2, joined


def test_read_ahead_stops_its_thread_when_the_reader_leaves_early(tmp_path):
    import threading
    import time
    from daq.replay import iter_chunks_ahead
    from daq.runlog import RunLog
    it = iter_chunks_ahead(RunLog.open(_blocks_log(tmp_path)))
    next(it)
    it.close()                                         # as a `break` out of the loop does
    deadline = time.monotonic() + 5
    while any(t.name.startswith("log reader") for t in threading.enumerate()):
        assert time.monotonic() < deadline, "the reader thread is still running"
        time.sleep(0.01)


def test_a_log_without_counted_blips_is_replayed_without_a_list_of_gains(tmp_path):
    # Samples written by another program (no events): the replay counts them and says there
    # is nothing to compare with, instead of listing every mode as gained.
    from sims.trace import simulate_trace
    rig = load_rig(None, ["sweep.settle_s=0"])
    tr = simulate_trace(rig.sections)
    log = RunLog.create(tmp_path / "bare.db", rig)
    log.append_samples(np.arange(tr.value.size) * 1e-3, tr.position_steps, tr.direction, tr.pass_index,
                       tr.value)
    log.close()
    r = _cli("replay", tmp_path / "bare.db", "--fast")
    assert r.returncode == 0, r.stderr
    assert "holds no counted blips to compare with" in r.stdout and "gained" not in r.stdout
    assert f"{tr.value.size:,} samples in" in r.stdout


def test_a_corrected_group_index_is_taken_by_a_replay(narrow):
    # L = lambda^2 / (2 n_g delta_lambda) (Coldren et al.): the length goes as 1 / n_g.
    path, live = narrow
    out = _json(_cli("replay", path, "--fast", "--json", "--set", "chip.group_index=3.80"))
    assert out["length_um"] == pytest.approx(live["length_um"] * 3.62 / 3.80, rel=1e-6)
    assert out["modes"] == live["modes"]


def test_a_damaged_log_is_called_damaged(narrow, tmp_path):
    cut = tmp_path / "cut.db"
    data = Path(narrow[0]).read_bytes()
    cut.write_bytes(data[: len(data) // 2])
    res = _cli("analyze", cut)
    # (cut in half, a log may still open and fail on the first block read instead: damaged too)
    assert res.returncode == 2 and "damaged" in res.stderr, res.stderr
    txt = tmp_path / "notes.db"
    txt.write_text("not a sqlite file\n")
    res = _cli("analyze", txt)
    assert res.returncode == 2 and "not a modetick run log" in res.stderr, res.stderr
