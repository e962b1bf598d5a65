"""One VISA session (pyvisa; default backend the pure-Python pyvisa-py).

Maps pyvisa's failures onto the driver errors: a timeout is transient, a
vanished port or an I/O error is a ``DeviceError``; every message names the
resource and what was sent. Shared by the SCPI detector and the auxiliary
channels.
"""
from __future__ import annotations

import re

from drivers.base import DeviceError, TransientDeviceError
from drivers.messages import open_reason, short
from drivers.replies import parse_value
from drivers.retry import with_retries

# The SCPI error queue's answer (SCPI-99, from memory): an integer code, a comma, a quoted
# message, e.g. 0,"No error" or -113,"Undefined header" (a quote inside is doubled; some
# meters leave the quotes out).
SCPI_ERROR_REPLY = re.compile(r'\s*[-+]?\d+\s*,\s*("(?:[^"]|"")*"|[A-Za-z].*)\s*', re.S)
MAX_STALE_REPLIES = 2    # late replies read past before the error queue's answer

# The section also needs drivers.retry.RETRY_KEYS.
VISA_KEYS = {
    "resource": (str, ...),        # any VISA resource string, e.g. "ASRL/dev/ttyUSB1::INSTR",
                                   # "USB0::0x1234::0x5678::SN::INSTR", "TCPIP::192.0.2.7::INSTR"
    "visa_library": "@py",         # pyvisa backend: "@py" (pyvisa-py), "" (system VISA), "file.yaml@sim"
    "read_termination": "\n",
    "write_termination": "\n",
    "baudrate": 9600,              # serial (ASRL) resources only
    "timeout_s": 2.0,
}


def check_idn(reply: str, where: str) -> str:
    """Validate an *IDN? reply (four comma-separated fields by IEEE 488.2)."""
    fields = [f.strip() for f in reply.split(",")]
    if len(fields) < 4 or not fields[0] or not fields[1]:
        raise DeviceError(f"{where}: sent '*IDN?', got {reply!r}, expected "
                          "'manufacturer,model,serial,firmware' (is this the right instrument and baud rate?)")
    return ", ".join(fields[:4])


class VisaLink:
    """Opens the resource and checks that it answers *IDN? (IEEE 488.2)."""

    def __init__(self, cfg: dict, label: str):
        import pyvisa  # imported here so rig validation never loads VISA

        self.resource_name, self.label = cfg["resource"], label
        self._pyvisa = pyvisa
        try:
            rm = pyvisa.ResourceManager(cfg["visa_library"])
        except (OSError, ValueError, pyvisa.errors.Error) as exc:
            raise DeviceError(f"{label} {self.resource_name}: cannot load VISA library "
                              f"{cfg['visa_library']!r} ({short(exc)})") from None
        kwargs = dict(read_termination=cfg["read_termination"] or None,
                      write_termination=cfg["write_termination"] or None,
                      timeout=int(cfg["timeout_s"] * 1000))
        if self.resource_name.upper().startswith("ASRL"):
            kwargs["baud_rate"] = cfg["baudrate"]
        try:
            self.res = rm.open_resource(self.resource_name, **kwargs)
        except Exception as exc:  # pyvisa, pyserial and the backends raise many kinds
            raise DeviceError(f"{label} {self.resource_name}: cannot open it ({open_reason(exc, 'resource')})") from None
        self.cfg = cfg
        try:
            self.idn = check_idn(self.retrying(lambda: self.query("*IDN?")), self.where())
        except BaseException:
            self.close()
            raise

    def where(self) -> str:
        return f"{self.label} {self.resource_name}"

    def query(self, command: str) -> str:
        return self._reply(command, lambda: self.res.query(command))

    def read_reply(self, command: str) -> str:
        """The next reply line, for a command already sent."""
        return self._reply(command, self.res.read)

    def _reply(self, command: str, exchange) -> str:
        """One reply line from ``exchange()``, its failures as device errors."""
        try:
            reply = exchange()
        except self._pyvisa.errors.VisaIOError as exc:
            if exc.error_code == self._pyvisa.constants.StatusCode.error_timeout:
                raise TransientDeviceError(f"{self.where()}: sent {command!r}, no reply within "
                                           f"{self.res.timeout / 1000:g} s") from None
            raise DeviceError(f"{self.where()}: sent {command!r}, I/O error ({short(exc)})") from None
        except UnicodeDecodeError:
            raise TransientDeviceError(f"{self.where()}: sent {command!r}, got undecodable bytes") from None
        except Exception as exc:  # pyserial underneath: port gone
            raise DeviceError(f"{self.where()}: port closed or cable pulled while sending {command!r} "
                              f"({short(exc)})") from None
        reply = reply.strip()
        if not reply.isprintable():
            raise TransientDeviceError(f"{self.where()}: sent {command!r}, got garbled reply {reply!r}")
        return reply

    def retrying(self, action):
        """Run action with the section's retries; SYST:ERR? quoted if they run out."""
        return with_retries(action, retries=self.cfg["retries"], backoff_s=self.cfg["backoff_s"],
                            recover=self.recover)

    def query_number(self, command: str, value_rx: re.Pattern | None = None) -> float:
        """Query one number: the group ``value`` of value_rx, else the first comma field."""
        reply = self.query(command)
        if value_rx is not None:
            m = value_rx.fullmatch(reply)
            if not m:
                raise TransientDeviceError(f"{self.where()}: sent {command!r}, got {reply!r}, "
                                           f"expected value_reply {value_rx.pattern!r}")
            field = m["value"]
        else:
            field = reply.split(",")[0].strip()
        return parse_value(field, self.where(), command, reply)

    def write(self, command: str) -> None:
        try:
            self.res.write(command)
        except Exception as exc:
            raise DeviceError(f"{self.where()}: could not send {command!r} ({short(exc)})") from None

    def discard_input(self) -> None:
        """Drop a late reply still in the input buffer (where the backend can)."""
        try:
            self.res.flush(self._pyvisa.constants.BufferOperation.discard_read_buffer)
        except Exception:
            pass

    def error_queue(self) -> str | None:
        """One entry of the IEEE 488.2 / SCPI error queue (SYST:ERR?), or None.

        A reply that is not ``<code>,"<message>"`` is a late answer to the failed
        command that arrived first: the queue's own answer is read after it, so
        that neither passes for the other (the late number for the error, the
        error for the next reading)."""
        try:
            reply = self.query("SYST:ERR?")
            for stale in range(MAX_STALE_REPLIES + 1):
                if SCPI_ERROR_REPLY.fullmatch(reply):
                    return reply
                if stale < MAX_STALE_REPLIES:
                    reply = self.read_reply("SYST:ERR?")
            return None
        except DeviceError:
            return None
        finally:
            self.discard_input()


    def recover(self) -> str | None:
        """After a failed exchange: drop late input, then quote the error queue."""
        self.discard_input()
        err = self.error_queue()
        return f"SYST:ERR? -> {err!r}" if err else None

    def close(self) -> None:
        try:
            self.res.close()
        except Exception:
            pass

