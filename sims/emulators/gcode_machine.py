"""A small G-code motion controller (one axis drives the grating) on a pty.

Understands the RS274NGC words the gcode driver uses (NIST RS274NGC
interpreter spec, version 3): G90/G91 distance mode, G0/G1 with an axis word
and F (units per minute), G4 dwell with P in seconds, G21/G20 units (accepted,
not converted), comments in parentheses or after ``;``, N line numbers. Like
common open firmware it answers every line with ``ok``, plans moves ahead
(``ok`` for a move comes at once) and answers G4 only when motion is done. It
also takes the firmware-specific M114 (position report) and M410 (quick stop,
handled at once, even while other lines wait) and G28 (home to 0).
"""
from __future__ import annotations

import re
import time
from collections import deque

from sims.emulators.motion import Motion
from sims.emulators.pty_port import Handler, PtyPort, Reply

_WORD = re.compile(r"([A-Za-z])\s*([-+]?\d*\.?\d+)")


def parse_words(line: str) -> list[tuple[str, float]]:
    """'N10 G1 X1.5 F60 (go)' -> [('N', 10), ('G', 1), ('X', 1.5), ('F', 60)]."""
    line = re.sub(r"\([^)]*\)", " ", line).split(";")[0]
    return [(letter.upper(), float(num)) for letter, num in _WORD.findall(line)]


class GcodeMachine(Handler):
    eol_in = "any-crlf"

    def __init__(self, physics, units_per_step: float, axis: str = "X", start_steps: int | None = None,
                 min_steps: int = -1_000_000, max_steps: int = 1_000_000, planner_slots: int = 4):
        self.units_per_step, self.axis = units_per_step, axis.upper()
        self.motion = Motion(physics, start_steps, min_steps, max_steps)
        self.absolute = True
        self.feed_per_min = 60.0
        self.planned: deque[tuple[int, float]] = deque()   # (target steps, speed steps/s)
        self.slots = planner_slots
        self._dwell_until = 0.0
        self.lines = 0

    def busy(self) -> bool:
        return self.motion.busy() or bool(self.planned)

    def tick(self, now: float) -> None:
        self.motion.tick(now)
        if not self.motion.busy() and self.planned:
            target, speed = self.planned.popleft()
            self.motion.start(target, speed, now)

    def is_urgent(self, line: str) -> bool:
        return line.strip().upper().startswith("M410")

    def _planned_end(self) -> int:
        return self.planned[-1][0] if self.planned else self.motion.target

    def handle(self, line: str, now: float) -> list[Reply]:
        self.tick(now)
        self.lines += 1
        words = [w for w in parse_words(line) if w[0] != "N"]
        if not words:
            return [Reply("ok")]
        codes = [(l, v) for l, v in words if l in "GM"]
        values = {l: v for l, v in words if l not in "GM"}
        if "F" in values:
            self.feed_per_min = values["F"]
        if not codes:
            return [Reply("error:20 (no G or M word)")]
        letter, num = codes[0]
        code = f"{letter}{num:g}"
        if code in ("G90", "G91"):
            self.absolute = code == "G90"
        elif code in ("G20", "G21"):
            pass
        elif code in ("G0", "G1"):
            if self.axis in values:
                units = values[self.axis]
                steps = round(units / self.units_per_step)
                target = steps if self.absolute else self._planned_end() + steps
                speed = 1e6 if code == "G0" else self.feed_per_min / 60.0 / self.units_per_step
                self.planned.append((target, speed))
                self.tick(now)
                if len(self.planned) > self.slots:   # planner full: ok once there is room
                    return [Reply("ok", ready=lambda: len(self.planned) <= self.slots)]
        elif code == "G4":
            dwell_s = values.get("P", 0.0)
            state = {}

            def done() -> bool:
                if self.busy():
                    return False
                t = time.monotonic()
                state.setdefault("t_end", t + dwell_s)
                return t >= state["t_end"]
            return [Reply("ok", ready=done)]
        elif code == "G28":
            self.planned.append((0, 1e6))
            self.tick(now)
        elif code == "M114":
            pos = self.motion.steps() * self.units_per_step
            return [Reply(f"{self.axis}:{pos:.4f} Y:0.0000 Z:0.0000 E:0.0000 Count {self.axis}:{self.motion.steps()}"),
                    Reply("ok")]
        elif code == "M410":
            self.planned.clear()
            self.motion.stop()
        else:
            return [Reply(f"error:20 (unsupported command {code})")]
        return [Reply("ok")]


def start_gcode_machine(physics, units_per_step: float, **kwargs) -> tuple[PtyPort, GcodeMachine]:
    machine = GcodeMachine(physics, units_per_step, **kwargs)
    return PtyPort(machine, "\n", name="gcode").start(), machine
