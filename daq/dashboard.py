"""Live view of a running sweep: a rich dashboard on a terminal, plain lines otherwise.

Both views render from their own thread at a few Hz, reading the engine's
LiveState, so drawing never holds up the step loop. The terminal layout fits
80x24 and uses only box-drawing and block characters, which survive SSH.
"""
from __future__ import annotations

import os
import sys
import threading
import time

from typing import TYPE_CHECKING

from daq.engine import LiveState
from daq.numbers import no_negative_zero, u_decimals

# rich is imported where a terminal view is drawn: piped or --json runs (replay
# --fast, overnight runs under a scheduler) start without it.
if TYPE_CHECKING:
    from rich.console import Console
    from rich.panel import Panel
    from rich.text import Text

# A 3x5 block font for the mode count: each string is one row of a digit.
_FONT = {
    "0": ["███", "█ █", "█ █", "█ █", "███"], "1": [" █ ", "██ ", " █ ", " █ ", "███"],
    "2": ["███", "  █", "███", "█  ", "███"], "3": ["███", "  █", " ██", "  █", "███"],
    "4": ["█ █", "█ █", "███", "  █", "  █"], "5": ["███", "█  ", "███", "  █", "███"],
    "6": ["███", "█  ", "███", "█ █", "███"], "7": ["███", "  █", " █ ", " █ ", " █ "],
    "8": ["███", "█ █", "███", "█ █", "███"], "9": ["███", "█ █", "███", "  █", "███"],
    "-": ["   ", "   ", "███", "   ", "   "],
}
_LEVELS = " ▁▂▃▄▅▆▇█"

COUNT_STYLE = "bold gold1"
LABEL_STYLE = "grey62"
TRACE_STYLE = "spring_green3"
BLIP_STYLE = "bold orange_red1"
WARN_STYLE = "yellow"


def big_number(n: int | None) -> Text:
    """The count drawn 5 rows tall, each font pixel two cells wide."""
    from rich.text import Text
    s = "-" if n is None else str(n)
    rows = [" ".join("".join(c * 2 for c in _FONT[ch][r]) for ch in s) for r in range(5)]
    return Text("\n".join(rows), style=COUNT_STYLE)


def sparkline(values: list[float], width: int) -> str:
    """Two text rows of block characters for the most recent ``width`` readings."""
    vals = values[-width:]
    if not vals:
        return "\n"
    lo, hi = min(vals), max(vals)
    span = (hi - lo) or 1.0
    top, bottom = [], []
    for v in vals:
        level = int(round((v - lo) / span * 16))
        bottom.append(_LEVELS[min(level, 8)])
        top.append(_LEVELS[max(level - 8, 0)])
    return "".join(top) + "\n" + "".join(bottom)


def strip_chart(recent: list[tuple[int, float]], blips: set[int], width: int) -> tuple[str, str]:
    """Recent (index, value) readings squeezed into ``width`` columns.

    Each column shows the maximum of its bin of readings, so a narrow blip
    never falls between columns; a marker row puts ▲ under columns holding a
    counted blip.
    """
    if not recent:
        return "\n", ""
    per_col = -(-len(recent) // width)
    cols = [recent[k:k + per_col] for k in range(0, len(recent), per_col)]
    peaks = [max(v for _, v in c) for c in cols]
    marks = "".join("▲" if any(i in blips for i, _ in c) else " " for c in cols)
    return sparkline(peaks, width), marks


def _fmt_u(x, u, digits: int = 2) -> str:
    """x ± u with u to two significant digits and x to the same decimal place."""
    if x is None:
        return "…"
    if u is None or u != u or u <= 0:
        return f"{x:.{digits}f}"
    dec = min(max(digits, u_decimals(u)), 8)
    if u >= 10:
        dec = 0
    return f"{x:.{dec}f} ± {u:.{dec}f}"


def _clock(seconds: float | None) -> str:
    if seconds is None or seconds != seconds or seconds < 0:
        return "…"
    s = int(seconds)
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}"


def time_left_s(st: LiveState) -> float | None:
    rate = st.rate_per_s()
    if rate <= 0:
        return None
    return max(st.total_samples - st.samples, 0) / rate


def render(st: LiveState, width: int = 80) -> Panel:
    from rich.console import Group
    from rich.panel import Panel
    from rich.table import Table
    from rich.text import Text
    est = st.estimate or {}
    spacing, spacing_u = est.get("spacing_steps"), est.get("spacing_steps_u")
    # converted where it was measured (the middle of the modes so far), not mid-sweep
    calib = (st.calib(spacing, spacing_u, est.get("centre_steps"), est.get("backlash_steps"))
             if (st.calib and spacing) else None)

    left = Table.grid()
    left.add_row(Text("modes counted", style=LABEL_STYLE))
    # the block digits need ~26 columns beside the figures: on a narrow terminal, plain bold
    left.add_row(big_number(est.get("modes", 0)) if width >= 76 else
                 Text(str(est.get("modes", 0)), style=COUNT_STYLE))
    left.add_row(Text(f"blips seen {est.get('crossings', 0)}", style=LABEL_STYLE))

    right = Table.grid(padding=(0, 1))
    right.add_column(style=LABEL_STYLE, no_wrap=True, min_width=11)   # "chip length" whole
    right.add_column(no_wrap=True)
    if est.get("warming_up"):       # a 0 that is not a count yet
        right.add_row("warming up", Text(est["warming_up"], style=WARN_STYLE))
    right.add_row("spacing", f"{_fmt_u(spacing, spacing_u)} steps")
    if calib:
        right.add_row("", f"{_fmt_u(calib['spacing_nm'], calib['spacing_nm_u'], 4)} nm"
                          f" at {calib['wavelength_nm']:.2f} nm")
        right.add_row("chip length", f"{_fmt_u(calib['length_um'], calib['length_um_u'], 0)} µm")
    bl = est.get("backlash_steps")
    if bl is not None:
        right.add_row("backlash", f"{no_negative_zero(bl):.1f} steps")
    arrow = "↑ up" if st.direction > 0 else "↓ down"
    right.add_row("position", f"{st.position_steps} steps  {arrow}  pass {st.pass_index + 1}/{st.passes}")
    right.add_row("progress", f"{st.samples}/{st.total_samples} samples  {st.rate_per_s():.0f}/s  "
                              f"left {_clock(time_left_s(st))}")
    for k, v in list(st.aux.items())[:2]:
        right.add_row(k, f"{v:.4g}")

    top = Table.grid(expand=True)
    top.add_column(width=26 if width >= 76 else 15)
    top.add_column(ratio=1)
    top.add_row(left, right)

    inner = max(width - 4, 20)
    trace, marker = strip_chart(list(st.recent), set(st.recent_blips), inner)

    ev = Text()
    for kind, detail in list(st.events)[-4:]:
        style = "yellow" if kind == "warning" else ("bold red" if kind == "fault" else LABEL_STYLE)
        ev.append(f"{kind:8s} {detail}\n", style=style)
    if st.paused:
        ev.append("PAUSED: press p to go on\n", style="bold yellow")

    footer = Text(f"log {st.log_path}   p pause/resume · q stop", style=LABEL_STYLE)
    title = f"{st.title} · {'paused' if st.paused else st.status}"
    return Panel(Group(top, Text(""), Text(trace, style=TRACE_STYLE), Text(marker, style=BLIP_STYLE),
                       ev, footer), title=title, title_align="left",
                 border_style="grey50", width=min(width, 120))


class TerminalView:
    """rich Live dashboard, refreshed from rich's own thread."""

    def __init__(self, state: LiveState, console: Console | None = None, refresh_per_second: float = 4):
        from rich.console import Console
        from rich.live import Live
        self.state = state
        self.console = console or Console(stderr=False)
        self.live = Live(console=self.console, refresh_per_second=refresh_per_second,
                         get_renderable=lambda: render(self.state, self.console.width),
                         transient=False, redirect_stderr=False)

    def __enter__(self):
        self.live.__enter__()
        return self

    def __exit__(self, *exc):
        self.live.refresh()
        self.live.__exit__(*exc)
        return False


class PlainView:
    """One progress line on stderr every few seconds, for pipes and cron jobs."""

    def __init__(self, state: LiveState, every_s: float = 2.0, stream=None):
        self.state, self.every_s = state, every_s
        self.stream = stream or sys.stderr
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._seen_events = 0

    def line(self) -> str:
        st, est = self.state, self.state.estimate or {}
        sp = est.get("spacing_steps")
        spacing = f"{sp:.2f} steps" if sp else "…"
        return (f"modetick: pass {st.pass_index + 1}/{st.passes} pos {st.position_steps} "
                f"samples {st.samples}/{st.total_samples} modes {est.get('modes', 0)} "
                f"spacing {spacing} left {_clock(time_left_s(st))}"
                + (f" (warming up: {est['warming_up']})" if est.get("warming_up") else ""))

    def _loop(self) -> None:
        while not self._stop.wait(self.every_s):
            self._print_events()
            print(self.line(), file=self.stream, flush=True)

    def _print_events(self) -> None:
        for kind, detail in list(self.state.events):
            if kind in ("warning", "fault"):
                key = (kind, detail)
                if key != getattr(self, "_last_event", None):
                    print(f"modetick: {kind}: {detail}", file=self.stream, flush=True)
                    self._last_event = key

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join(timeout=1)
        self._print_events()
        print(self.line(), file=self.stream, flush=True)
        return False


class KeyReader:
    """Reads single keys from a terminal: p toggles pause, q asks to stop."""

    def __init__(self, pause_flag: threading.Event, request_stop):
        self.pause_flag, self.request_stop = pause_flag, request_stop
        self._old = None
        self._stop = threading.Event()

    def __enter__(self):
        if not sys.stdin.isatty():
            return self
        import termios
        import tty
        fd = sys.stdin.fileno()
        self._old = termios.tcgetattr(fd)
        tty.setcbreak(fd)
        threading.Thread(target=self._loop, args=(fd,), daemon=True).start()
        return self

    def _loop(self, fd: int) -> None:
        import select
        while not self._stop.is_set():
            ready, _, _ = select.select([fd], [], [], 0.1)
            if not ready:
                continue
            ch = os.read(fd, 1).decode(errors="ignore").lower()
            if ch == "p":
                if self.pause_flag.is_set():
                    self.pause_flag.clear()
                else:
                    self.pause_flag.set()
            elif ch == "q":
                self.request_stop()

    def __exit__(self, *exc):
        self._stop.set()
        if self._old is not None:
            import termios
            time.sleep(0.12)
            termios.tcsetattr(sys.stdin.fileno(), termios.TCSADRAIN, self._old)
        return False
