"""A meter with a plain ASCII line protocol (not SCPI): query word in, value line out.

For the ``serial-ascii`` detector driver: the query word and the reply format
are parameters, like the stepper emulator's protocol.
"""
from __future__ import annotations

from sims.emulators.pty_port import Handler, PtyPort, Reply


class LineMeter(Handler):
    """Answers ``query`` with ``reply_format.format(value=...)``; a pty handler."""

    def __init__(self, physics, query: str = "D?", reply_format: str = "D={value:+.6e} V",
                 eol_in: str = "\r", gain: float = 1.0):
        self.physics, self.query, self.reply_format = physics, query, reply_format
        self.eol_in, self.gain = eol_in, gain
        self.reads = 0

    def handle(self, line: str, now: float) -> list[Reply]:
        if line != self.query:
            return [Reply("?")]
        self.reads += 1
        return [Reply(self.reply_format.format(value=self.gain * self.physics.read_value()))]


def start_line_meter(physics, eol_out: str = "\r\n", **kwargs) -> tuple[PtyPort, LineMeter]:
    meter = LineMeter(physics, **kwargs)
    return PtyPort(meter, eol_out, name="line-meter").start(), meter
