"""The dashboard in a real terminal: tmux runs `modetick sweep` in an 80x24 pane."""
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

pytestmark = pytest.mark.skipif(shutil.which("tmux") is None, reason="tmux is not installed")


def _tmux(*args, **kw):
    return subprocess.run(["tmux", *args], capture_output=True, text=True, timeout=20, **kw)


def test_dashboard_in_tmux_then_quit_key(tmp_path):
    session = f"modetick-test-{int(time.time() * 1000) % 10**8}"
    log = tmp_path / "live.db"
    cmd = (f"cd {ROOT} && {sys.executable} -m daq sweep --log {log} "
           f"--set sweep.settle_s=0.004 --set sweep.passes=4; echo EXIT=$?; sleep 30")
    _tmux("new-session", "-d", "-s", session, "-x", "80", "-y", "24", cmd)
    try:
        screen = ""
        deadline = time.time() + 30
        while time.time() < deadline:
            time.sleep(0.5)
            screen = _tmux("capture-pane", "-p", "-t", session).stdout
            if "modes counted" in screen and "samples" in screen and "/s" in screen:
                break
        assert "modes counted" in screen, screen
        assert "modetick sweep · running" in screen
        lines = screen.splitlines()
        assert len(lines) <= 24 and all(len(l) <= 80 for l in lines)
        # p pauses (the dashboard says so and the sample count stands still), p again resumes.
        _tmux("send-keys", "-t", session, "p")
        deadline = time.time() + 10
        while time.time() < deadline and "PAUSED" not in screen:
            time.sleep(0.3)
            screen = _tmux("capture-pane", "-p", "-t", session).stdout
        assert "PAUSED" in screen and "· paused" in screen, screen
        def progress(text: str) -> int:     # -1 while the pane is caught mid-redraw
            m = re.search(r"(\d+)/\d+ samples", text)
            return int(m.group(1)) if m else -1

        def shown() -> int:
            for _ in range(10):              # caught mid-redraw: look again
                n = progress(_tmux("capture-pane", "-p", "-t", session).stdout)
                if n >= 0:
                    return n
                time.sleep(0.1)
            return -1
        # The last samples before the pause are written by a background thread, so the
        # count may still catch up after PAUSED shows: take it once two looks agree.
        first, deadline = shown(), time.time() + 10
        while True:
            time.sleep(0.5)
            again = shown()
            if again == first >= 0:
                break
            assert time.time() < deadline, f"the count did not stand still: {first} then {again}"
            first = again
        time.sleep(1.0)
        assert shown() == first
        _tmux("send-keys", "-t", session, "p")
        # Resumed: wait for it rather than for a fixed second (a loaded machine may be slower).
        deadline = time.time() + 10
        while time.time() < deadline:
            time.sleep(0.3)
            screen = _tmux("capture-pane", "-p", "-t", session).stdout
            if "PAUSED" not in screen and "· running" in screen and progress(screen) > first:
                break
        assert "PAUSED" not in screen and progress(screen) > first, screen
        # The q key stops the run cleanly after the current step: exit 130, log kept.
        _tmux("send-keys", "-t", session, "q")
        deadline = time.time() + 20
        while time.time() < deadline and "EXIT=" not in screen:
            time.sleep(0.3)
            screen = _tmux("capture-pane", "-p", "-t", session, "-S", "-60").stdout
        assert "EXIT=130" in screen, screen
        # the dashboard's last frame counts what the summary below it counts
        frame = re.findall(r"│ blips seen (\d+)", screen)
        summary = re.findall(r"\((\d+) blips seen\)", screen)
        assert frame and summary and frame[-1] == summary[-1], screen
    finally:
        _tmux("kill-session", "-t", session)
    from daq.runlog import RunLog
    lg = RunLog.open(log)
    assert lg.meta("status") == "stopped" and lg.n_samples > 0
    assert lg.meta("reason") == "stopped with the q key"
