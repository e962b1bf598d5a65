"""An ASCII stepper-motor controller whose protocol is a parameter.

Command words, reply formats and terminators all come from a
``StepperProtocol``, so a test can present a protocol no driver has been
written for and configure the driver from the rig file alone. Motion takes
time (``speed_steps_per_s``); while moving the controller reports busy and
its position walks towards the target, and the physics (the simulated bench)
is moved step by step with it. Hardware limit switches stop a move early.
"""
from __future__ import annotations

import json
import re
from dataclasses import asdict, dataclass, fields

from sims.emulators.motion import Motion
from sims.emulators.pty_port import Handler, PtyPort, Reply


@dataclass
class StepperProtocol:
    eol_in: str = "\r"                  # or "any-crlf"
    eol_out: str = "\r\n"
    move_abs: str = "MA {steps}"        # command template; {steps} a signed integer
    ack: str | None = "OK"              # reply to a move; None: moves are not answered
    query_position: str = "POS?"
    position_reply: str = "POS {steps}"
    busy_query: str | None = "BUSY?"
    busy_reply: str = "1"
    idle_reply: str = "0"
    stop: str = "ST"
    stop_reply: str | None = None
    home: str | None = "HOME"
    set_speed: str | None = "VEL {steps_per_s}"   # answered like a move (ack)
    identify_query: str | None = "ID?"
    identify_reply: str = "EMU-STEP 2.1 emulated stepper controller"
    echo: bool = False                  # repeat each command line before replying
    error_reply: str | None = "ERR"     # answer to an unknown command (None: silence)
    case_sensitive: bool = True
    speed_steps_per_s: float = 50000.0
    min_travel_steps: int = -1_000_000  # hardware limit switches
    max_travel_steps: int = 1_000_000
    start_steps: int | None = None      # None: wherever the physics is at power-up

    @classmethod
    def from_json(cls, text: str) -> "StepperProtocol":
        data = json.loads(text)
        known = {f.name for f in fields(cls)}
        unknown = set(data) - known
        if unknown:
            raise ValueError(f"unknown stepper protocol fields: {', '.join(sorted(unknown))}")
        return cls(**data)

    def to_json(self) -> str:
        return json.dumps(asdict(self))


def _template_rx(template: str, field: str, flags: int) -> re.Pattern:
    head, _, tail = template.partition("{" + field + "}")
    return re.compile(re.escape(head) + rf"(?P<{field}>[-+]?\d+)" + re.escape(tail), flags)


class StepperController(Handler):
    """The controller's logic (a pty handler); ``physics`` is a SimBench or stand-in."""

    def __init__(self, protocol: StepperProtocol, physics):
        self.p, self.physics = protocol, physics
        self.eol_in = protocol.eol_in
        flags = 0 if protocol.case_sensitive else re.IGNORECASE
        self._move_rx = _template_rx(protocol.move_abs, "steps", flags)
        self._speed_rx = _template_rx(protocol.set_speed, "steps_per_s", flags) if protocol.set_speed else None
        self.speed_steps_per_s = protocol.speed_steps_per_s
        self.motion = Motion(physics, protocol.start_steps, protocol.min_travel_steps,
                             protocol.max_travel_steps)

    def _is(self, line: str, word: str | None) -> bool:
        if word is None:
            return False
        return line == word if self.p.case_sensitive else line.lower() == word.lower()

    def busy(self) -> bool:
        return self.motion.busy()

    def tick(self, now: float) -> None:
        self.motion.tick(now)

    def is_urgent(self, line: str) -> bool:
        return self._is(line, self.p.stop)

    def handle(self, line: str, now: float) -> list[Reply]:
        self.tick(now)
        out = [Reply(line)] if self.p.echo else []
        p, motion = self.p, self.motion
        m = self._move_rx.fullmatch(line)
        if m:
            motion.start(int(m["steps"]), self.speed_steps_per_s, now)
            if p.ack is not None:
                out.append(Reply(p.ack))
        elif self._speed_rx is not None and self._speed_rx.fullmatch(line):
            self.speed_steps_per_s = max(1.0, float(self._speed_rx.fullmatch(line)["steps_per_s"]))
            if p.ack is not None:
                out.append(Reply(p.ack))
        elif self._is(line, p.query_position):
            out.append(Reply(p.position_reply.format(steps=motion.steps())))
        elif self._is(line, p.busy_query):
            out.append(Reply(p.busy_reply if motion.busy() else p.idle_reply))
        elif self._is(line, p.stop):
            motion.stop()
            if p.stop_reply is not None:
                out.append(Reply(p.stop_reply))
        elif self._is(line, p.home):
            motion.start(0, self.speed_steps_per_s, now)
        elif self._is(line, p.identify_query):
            out.append(Reply(p.identify_reply))
        elif p.error_reply is not None:
            out.append(Reply(p.error_reply))
        return out


def start_stepper(physics, protocol: StepperProtocol | None = None) -> tuple[PtyPort, StepperController]:
    """Start the controller on a fresh pty; returns (port, controller). ``port.path`` is the device."""
    protocol = protocol or StepperProtocol()
    ctl = StepperController(protocol, physics)
    port = PtyPort(ctl, protocol.eol_out, name="stepper").start()
    return port, ctl
