"""A text-line connection to a serial device (pyserial), with honest errors.

Every message names the port, what was sent and what came back, on one line
(control characters shown escaped), so it can go to the user as it is.
Timeouts and partial or undecodable lines are ``TransientDeviceError``; a
port that vanishes (cable pulled, adapter unplugged) is ``DeviceError``.
"""
from __future__ import annotations

import re
import time

import serial

from drivers.base import DeviceError, TransientDeviceError
from drivers.messages import open_reason, short

# Keys every serial-line driver reads (merged into its rig-file schema).
SERIAL_KEYS = {
    "port": (str, None),   # device path (/dev/ttyUSB0, COM3) or pyserial URL (socket://host:port)
    "baudrate": 9600,
    "framing": "8N1",      # data bits, parity (N/E/O/M/S), stop bits
    "eol": "\r\n",         # line terminator sent after each command and expected after each reply
    "timeout_s": 1.0,      # longest wait for one reply line
}

try:                       # pyserial's POSIX port raises termios.error (not an OSError)
    from termios import error as _TermiosError   # from tcflush on a vanished tty
except ImportError:        # Windows
    class _TermiosError(Exception):
        pass

# What a vanished port raises somewhere in pyserial.
PORT_GONE = (serial.SerialException, OSError, _TermiosError)

_CRLF = set("\r\n")
_POLL_S = 0.02             # pyserial read granularity; the deadline is checked between reads


def parse_framing(text: str) -> tuple[int, str, float]:
    """'8N1' -> (8, 'N', 1.0); raises ValueError on anything else."""
    m = re.fullmatch(r"([5-8])([NEOMS])(1|1\.5|2)", text.strip().upper())
    if not m:
        raise ValueError(f"framing {text!r}: expected e.g. \"8N1\" (data bits 5-8, parity N/E/O/M/S, stop bits 1/1.5/2)")
    return int(m[1]), m[2], float(m[3])


def decode_escapes(text: str) -> str:
    """Turn the two-character sequences \\r, \\n, \\t into control characters.

    TOML basic strings already decode them; this helps values given through
    ``--set`` on a shell command line, where they arrive literally.
    """
    return text.replace("\\r", "\r").replace("\\n", "\n").replace("\\t", "\t")


class LineLink:
    """Commands out, reply lines back, over one serial port or pyserial URL."""

    def __init__(self, port: str, *, baudrate: int, eol: str, timeout_s: float,
                 framing: str = "8N1", label: str = "device"):
        self.port, self.label = port, label
        self.eol = decode_escapes(eol)
        if not self.eol:
            raise DeviceError(f"{label} {port}: eol must not be empty")
        self.timeout_s = timeout_s
        # A terminator made only of CR/LF accepts any CR/LF ending on replies
        # (controllers disagree on \r vs \r\n); anything else must match exactly.
        self._any_crlf = set(self.eol) <= _CRLF
        self._rx = b""
        self._broken: str | None = None
        bytesize, parity, stopbits = parse_framing(framing)
        try:
            self._ser = serial.serial_for_url(
                port, baudrate=baudrate, bytesize=bytesize, parity=parity, stopbits=stopbits,
                timeout=min(_POLL_S, timeout_s), write_timeout=timeout_s)
        except (*PORT_GONE, ValueError) as exc:
            raise DeviceError(f"{label} port {port}: cannot open it ({open_reason(exc)})") from None

    def where(self) -> str:
        return f"{self.label} {self.port}"

    # -- low level ------------------------------------------------------------
    def _dead(self, doing: str, exc: BaseException) -> DeviceError:
        self._broken = f"{exc}"
        return DeviceError(f"{self.where()}: port closed or cable pulled while {doing} ({short(exc)})")

    def flush_input(self) -> None:
        """Drop buffered input (stale or late replies) before a new command."""
        self._check_alive()
        self._rx = b""
        try:
            self._ser.reset_input_buffer()
        except PORT_GONE as exc:
            raise self._dead("clearing its input", exc) from None

    def _check_alive(self) -> None:
        if self._broken is not None:
            raise DeviceError(f"{self.where()}: port no longer usable ({self._broken})")

    def send(self, command: str) -> None:
        self._check_alive()
        try:
            data = (command + self.eol).encode("ascii")
        except UnicodeEncodeError:
            raise DeviceError(f"{self.where()}: command {command!r} is not plain ASCII; fix the rig file") from None
        try:
            self._ser.write(data)
            self._ser.flush()
        except serial.SerialTimeoutException:
            raise TransientDeviceError(f"{self.where()}: sent {command!r}, write timed out after {self.timeout_s} s") from None
        except PORT_GONE as exc:
            raise self._dead(f"sending {command!r}", exc) from None

    def _take_line(self) -> str | None:
        """Pop one complete line from the receive buffer, or None."""
        while True:
            if self._any_crlf:
                m = re.search(rb"[\r\n]", self._rx)
                if not m:
                    return None
                raw, self._rx = self._rx[:m.start()], self._rx[m.end():]
                if not raw:
                    continue            # the second half of a \r\n, or a blank line
            else:
                eol = self.eol.encode("ascii")
                if eol not in self._rx:
                    return None
                raw, self._rx = self._rx.split(eol, 1)
            return raw.decode("ascii", errors="replace").strip()

    def read_line(self, sent: str, timeout_s: float | None = None) -> str:
        """One reply line (terminator and surrounding blanks removed)."""
        self._check_alive()
        deadline = time.monotonic() + (self.timeout_s if timeout_s is None else timeout_s)
        looked = False       # read at least once: a thread held up past the deadline
        while True:          # must still see a reply that is already waiting
            line = self._take_line()
            if line is not None:
                if "\ufffd" in line or not line.isprintable():
                    raise TransientDeviceError(f"{self.where()}: sent {sent!r}, got garbled reply {line!r}")
                return line
            if looked and time.monotonic() >= deadline:
                break
            try:
                chunk = self._ser.read(max(1, self._ser.in_waiting))
            except PORT_GONE as exc:
                raise self._dead(f"waiting for the reply to {sent!r}", exc) from None
            self._rx += chunk
            looked = True
        waited = self.timeout_s if timeout_s is None else timeout_s
        if self._rx:
            partial = self._rx.decode("ascii", errors="replace")
            raise TransientDeviceError(
                f"{self.where()}: sent {sent!r}, got {partial!r} without the line terminator "
                f"{self.eol!r} within {waited:g} s (wrong eol setting?)")
        raise TransientDeviceError(f"{self.where()}: sent {sent!r}, no reply within {waited:g} s")

    def query(self, command: str, *, echo: bool = False, timeout_s: float | None = None) -> str:
        """Send a command after dropping stale input; return its reply line.

        With ``echo`` the device first repeats the command, which is checked.
        """
        self.flush_input()
        self.send(command)
        if echo:
            self.expect_echo(command, timeout_s)
        return self.read_line(command, timeout_s)

    def expect_echo(self, command: str, timeout_s: float | None = None) -> None:
        line = self.read_line(command, timeout_s)
        if line != command.strip():
            raise TransientDeviceError(f"{self.where()}: sent {command!r}, expected it echoed, got {line!r}")

    def close(self) -> None:
        try:
            self._ser.close()
        except PORT_GONE:
            pass

