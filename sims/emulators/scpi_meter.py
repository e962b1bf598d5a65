"""SCPI instruments on a pseudo-terminal: a photodiode meter and a laser controller.

Reached as VISA serial resources (``ASRL/dev/pts/N::INSTR``) through pyvisa
and pyvisa-py. Headers are matched as SCPI defines them: case-insensitive,
short or long form of each node (``MEAS`` or ``MEASURE``), optional nodes in
brackets, several commands per line separated by ``;``. An unknown header
queues ``-113,"Undefined header"`` (SCPI-99 error number, from memory) and,
if it was a query, produces no reply, as a real instrument would.

The meter's reading is the physics' ``read_value()`` at the bench's current
mechanical state (the stepper emulator moves the same physics). The laser
controller answers temperature and current readbacks and records every
setpoint written to it, so tests can prove nothing was written unasked.
"""
from __future__ import annotations

import re
from typing import Callable

from sims.emulators.pty_port import Handler, PtyPort, Reply


def scpi_header_rx(spec: str) -> re.Pattern:
    """'MEASure[:VOLTage][:DC]?' -> a regex accepting every legal spelling."""
    out = [r":?"]
    for token in re.findall(r"\[|\]|:|\*?[A-Za-z]+\d*|\?", spec):
        if token == "[":
            out.append("(?:")
        elif token == "]":
            out.append(")?")
        elif token in (":", "?"):
            out.append(re.escape(token))
        else:
            short = "".join(c for c in token if c.isupper() or c.isdigit() or c == "*")
            out.append(f"(?:{re.escape(short)}|{re.escape(token.upper())})")
    return re.compile("".join(out), re.IGNORECASE)


class ScpiInstrument(Handler):
    """A table of SCPI headers -> actions; a pty handler."""

    eol_in = "\n"

    def __init__(self, idn: str):
        self.idn = idn
        self.errors: list[str] = []
        self.writes: list[str] = []          # every non-query command received, in order
        self._queries: list[tuple[re.Pattern, Callable[[], str]]] = []
        self._commands: list[tuple[re.Pattern, Callable[[str], None]]] = []
        self.add_query("*IDN?", lambda: self.idn)
        self.add_query("*OPC?", lambda: "1")
        self.add_query("SYSTem:ERRor[:NEXT]?", self._next_error)
        self.add_command("*CLS", lambda arg: self.errors.clear())
        self.add_command("*RST", lambda arg: None)

    def add_query(self, spec: str, answer: Callable[[], str]) -> None:
        self._queries.append((scpi_header_rx(spec), answer))

    def add_command(self, spec: str, action: Callable[[str], None]) -> None:
        self._commands.append((scpi_header_rx(spec), action))

    def _next_error(self) -> str:
        return self.errors.pop(0) if self.errors else '+0,"No error"'

    def handle(self, line: str, now: float) -> list[Reply]:
        answers = []
        for part in filter(None, (p.strip() for p in line.split(";"))):
            header, _, arg = part.partition(" ")
            if header.endswith("?"):
                for rx, answer in self._queries:
                    if rx.fullmatch(header):
                        answers.append(answer())
                        break
                else:
                    self.errors.append('-113,"Undefined header"')
            else:
                for rx, action in self._commands:
                    if rx.fullmatch(header):
                        self.writes.append(part)
                        action(arg.strip())
                        break
                else:
                    self.errors.append('-113,"Undefined header"')
        return [Reply(";".join(answers))] if answers else []


class PhotodiodeMeter(ScpiInstrument):
    """A DMM reading a photodiode amplifier: volts = gain * physics.read_value() + offset."""

    def __init__(self, physics, gain: float = 1.0, offset: float = 0.0,
                 idn: str = "Modetick Emulated,PDM-100,EMU0042,1.3"):
        super().__init__(idn)
        self.physics, self.gain, self.offset = physics, gain, offset
        self.reads = 0
        for spec in ("MEASure[:VOLTage][:DC]?", "READ?", "FETCh?", "MEASure:POWer?"):
            self.add_query(spec, self._value)
        self.add_command("CONFigure[:VOLTage][:DC]", lambda arg: None)

    def _value(self) -> str:
        self.reads += 1
        return f"{self.gain * self.physics.read_value() + self.offset:+.8E}"


class LaserController(ScpiInstrument):
    """Current and temperature controller: readbacks and recorded setpoints."""

    def __init__(self, current_mA: float = 62.5, temp_C: float = 24.80,
                 idn: str = "Modetick Emulated,LDC-2,EMU0007,0.9"):
        super().__init__(idn)
        self.current_mA, self.temp_C = current_mA, temp_C
        self.add_query("SOURce:CURRent?", lambda: f"{self.current_mA:.3f}")
        self.add_query("SOURce:TEMPerature?", lambda: f"{self.temp_C:.3f}")
        self.add_query("SENSe:TEMPerature?", lambda: f"{self.temp_C + 0.002:.3f}")
        self.add_command("SOURce:CURRent", lambda arg: setattr(self, "current_mA", float(arg)))
        self.add_command("SOURce:TEMPerature", lambda arg: setattr(self, "temp_C", float(arg)))


def start_instrument(instrument: ScpiInstrument, eol_out: str = "\n", name: str = "scpi") -> PtyPort:
    """Serve a SCPI instrument on a fresh pty; the VISA resource is ``visa_resource(port)``."""
    return PtyPort(instrument, eol_out, name=name).start()


def visa_resource(port: PtyPort) -> str:
    return f"ASRL{port.path}::INSTR"
