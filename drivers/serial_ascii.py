"""Any controller or meter with an ASCII line protocol, described in the rig file.

The rig file gives the command words, the reply patterns (Python regular
expressions, matched against the whole reply line with surrounding blanks
removed) and the terminator, so a controller this project has never seen
needs no code. Moves are absolute, hence safe to resend after a transient
fault; completion is confirmed by polling (busy query or position) and the
final position is checked against the target.
"""
from __future__ import annotations

import re
import time
from typing import Any

from drivers.base import DeviceError, Reading, TransientDeviceError
from drivers.line_stage import LineStage
from drivers.messages import raise_first
from drivers.replies import parse_steps, parse_value, template_fields
from drivers.retry import RETRY_KEYS, with_retries
from drivers.serial_link import SERIAL_KEYS, LineLink

# A key whose default is ... must be given (daq.rig.REQUIRED is the Ellipsis;
# drivers never import daq).

STAGE_KEYS: dict[str, Any] = {
    **SERIAL_KEYS,
    "port": (str, ...),
    "echo": False,                    # the controller repeats each command before replying
    "move_abs": (str, ...),           # e.g. "MA {steps}"
    "ack_reply": (str, None),         # regex every move must answer with, e.g. "OK"
    "query_position": (str, ...),     # e.g. "POS?"
    "position_reply": (str, ...),     # regex with a group named steps, e.g. "POS=(?P<steps>[-+]?\\d+)"
    "busy_query": (str, None),        # e.g. "MOVING?"; without it the position is polled
    "idle_reply": (str, None),        # regex of the not-moving reply, e.g. "0"
    "busy_reply": (str, None),        # regex of the still-moving reply (optional extra validation)
    "stop_command": (str, ...),       # sent on every exit; must stop motion at once
    "stop_reply": (str, None),        # regex the stop command answers with, if it answers
    "home_command": (str, None),      # used only by an explicit home(); a sweep never homes
    "speed_command": (str, None),     # template with {steps_per_s}, for [sweep] mode = "scan";
                                      # answered like a move (ack_reply)
    "identify_query": (str, None),    # e.g. "VER?"
    "poll_s": 0.01,                   # longest pause between completion polls (they start at 0.5 ms
                                      # and double, so short moves finish without waiting)
    "move_timeout_s": 60.0,           # longest a single move may take
    "position_tolerance_steps": 0,    # accepted |reported - target| after a move
    **RETRY_KEYS,
}

DETECTOR_KEYS: dict[str, Any] = {
    **SERIAL_KEYS,
    "port": (str, ...),
    "echo": False,
    "query": (str, ...),              # e.g. "READ?"
    "value_reply": (str, ...),        # regex with a group named value, e.g. "V=(?P<value>\\S+)"
    "identify_query": (str, None),
    **RETRY_KEYS,
}


def _regex(section: str, key: str, pattern: str | None, group: str | None = None) -> re.Pattern | None:
    if pattern is None:
        return None
    try:
        rx = re.compile(pattern)
    except re.error as exc:
        raise DeviceError(f"[{section}] {key}: not a valid regular expression ({exc})") from None
    if group and group not in rx.groupindex:
        raise DeviceError(f"[{section}] {key}: needs a named group (?P<{group}>...), got {pattern!r}")
    return rx


def check_stage_settings(cfg: dict) -> list[tuple[str, str]]:
    """Problems in a serial-ascii [stage] section, as (key, message) pairs."""
    out = []
    for key, field in (("move_abs", "steps"), ("speed_command", "steps_per_s")):
        if cfg[key] is None:
            continue
        fields = template_fields(cfg[key])
        if fields != {field}:
            out.append((key, f"must contain {{{field}}} and no other {{...}} field, got {cfg[key]!r}"))
            continue
        try:
            cfg[key].format(**{field: 100})
        except ValueError as exc:
            out.append((key, f"bad format for {{{field}}} ({exc})"))
    for key, group in (("ack_reply", None), ("position_reply", "steps"), ("idle_reply", None),
                       ("busy_reply", None), ("stop_reply", None)):
        try:
            _regex("stage", key, cfg[key], group)
        except DeviceError as exc:
            out.append((key, str(exc).split(": ", 1)[1]))
    if (cfg["busy_query"] is None) != (cfg["idle_reply"] is None):
        out.append(("idle_reply", "busy_query and idle_reply go together"))
    return out


def check_detector_settings(cfg: dict) -> list[tuple[str, str]]:
    try:
        _regex("detector", "value_reply", cfg["value_reply"], "value")
    except DeviceError as exc:
        return [("value_reply", str(exc).split(": ", 1)[1])]
    return []


class SerialAsciiStage(LineStage):
    """A stepper controller speaking the line protocol given in ``[stage]``."""

    def __init__(self, cfg: dict, min_steps: int | None, max_steps: int | None):
        raise_first(check_stage_settings(cfg), "stage")
        self.ack = _regex("stage", "ack_reply", cfg["ack_reply"])
        self.pos_rx = _regex("stage", "position_reply", cfg["position_reply"], "steps")
        self.idle_rx = _regex("stage", "idle_reply", cfg["idle_reply"])
        self.busy_rx = _regex("stage", "busy_reply", cfg["busy_reply"])
        self.stop_rx = _regex("stage", "stop_reply", cfg["stop_reply"])
        super().__init__(cfg, min_steps, max_steps)
        self.name = f"serial-ascii stage on {cfg['port']}"
        self._scan_target: int | None = None

    # -- helpers ----------------------------------------------------------------
    def _query(self, command: str) -> str:
        return self.link.query(command, echo=self.cfg["echo"])

    def _position_once(self) -> int:
        q = self.cfg["query_position"]
        line = self._query(q)
        m = self.pos_rx.fullmatch(line)
        if not m:
            raise TransientDeviceError(f"{self.link.where()}: sent {q!r}, got {line!r}, "
                                       f"expected position_reply {self.pos_rx.pattern!r}")
        try:
            return parse_steps(m["steps"])
        except ValueError:
            raise TransientDeviceError(f"{self.link.where()}: sent {q!r}, got {line!r}: "
                                       f"steps {m['steps']!r} is not a whole number") from None

    # -- Stage interface ------------------------------------------------------------
    def identify(self) -> str:
        q = self.cfg["identify_query"]
        if q:
            ident = self._retry(lambda: self._query(q))
            return f"{ident} (on {self.cfg['port']})"
        return f"controller on {self.cfg['port']} at {self.position_steps()} steps"

    def position_steps(self) -> int:
        return self._retry(self._position_once)

    def _send_acked(self, cmd: str) -> None:
        """Send a command that changes state; check its ack (or echo) where the protocol has one."""
        if self.ack is not None:
            line = self._query(cmd)
            if not self.ack.fullmatch(line):
                raise TransientDeviceError(f"{self.link.where()}: sent {cmd!r}, got {line!r}, "
                                           f"expected ack_reply {self.ack.pattern!r}")
        else:
            self.link.flush_input()
            self.link.send(cmd)
            if self.cfg["echo"]:
                self.link.expect_echo(cmd)

    def _move_once(self, target: int) -> None:
        cmd = self.cfg["move_abs"].format(steps=target)
        self._send_acked(cmd)
        self._wait_until_done(cmd, target)

    def _idle(self, target: int) -> tuple[bool, str]:
        """One completion poll: (finished?, what the controller said)."""
        bq = self.cfg["busy_query"]
        if not bq:
            pos = self._position_once()
            return abs(pos - target) <= self.cfg["position_tolerance_steps"], f"position {pos}"
        last = self._query(bq)
        if self.idle_rx.fullmatch(last):
            return True, last
        if self.busy_rx is not None and not self.busy_rx.fullmatch(last):
            raise TransientDeviceError(f"{self.link.where()}: sent {bq!r}, got {last!r}, expected "
                                       f"idle_reply {self.idle_rx.pattern!r} or busy_reply {self.busy_rx.pattern!r}")
        return False, last

    def _wait_until_done(self, cmd: str, target: int) -> None:
        deadline = time.monotonic() + self.cfg["move_timeout_s"]
        pause = 0.0005
        while True:
            done, last = self._idle(target)
            if done:
                pos = self._position_once()
                if abs(pos - target) <= self.cfg["position_tolerance_steps"]:
                    return
                # Idle but elsewhere: the move was lost or cut short. Resending is
                # safe for absolute moves, so let the retry loop do it.
                raise TransientDeviceError(f"{self.link.where()}: sent {cmd!r}, controller idle at "
                                           f"{pos} steps instead of {target}")
            if time.monotonic() > deadline:
                raise DeviceError(f"{self.link.where()}: sent {cmd!r}, move not finished after "
                                  f"{self.cfg['move_timeout_s']:g} s (last reply {last!r}); stopped")
            time.sleep(pause)
            pause = min(2 * pause, self.cfg["poll_s"])

    # -- continuous scan ([sweep] mode = "scan") -----------------------------------------
    def start_scan(self, end_steps: int, speed_steps_per_s: float) -> None:
        """Set the speed and start a move to end_steps without waiting for it."""
        end_steps = int(end_steps)
        self.check_limits(end_steps)
        template = self.cfg["speed_command"]
        if not template:
            raise DeviceError(f"{self.link.where()}: [stage] speed_command is needed for a continuous scan")
        self._scan_target = end_steps
        try:
            self._retry(lambda: self._send_acked(template.format(steps_per_s=round(speed_steps_per_s))))
            self._retry(lambda: self._send_acked(self.cfg["move_abs"].format(steps=end_steps)))
        except BaseException:
            self.stop()
            raise

    def is_moving(self) -> bool:
        if self.cfg["busy_query"]:
            return not self._retry(lambda: self._idle(self._scan_target))[0]
        return self._scan_progress(self.position_steps(), self._scan_target)

    def home(self) -> None:
        """Run the controller's homing routine (only on explicit request)."""
        cmd = self.cfg["home_command"]
        if not cmd:
            raise DeviceError(f"{self.link.where()}: no home_command in the rig file")
        self.link.flush_input()
        self.link.send(cmd)

    def _after_stop(self) -> None:
        if self.stop_rx is not None:
            self.link.read_line(self.cfg["stop_command"])


class SerialAsciiDetector:
    """A meter that answers a query line with a value line."""

    def __init__(self, cfg: dict):
        raise_first(check_detector_settings(cfg), "detector")
        self.cfg = cfg
        self.value_rx = _regex("detector", "value_reply", cfg["value_reply"], "value")
        self.link = LineLink(cfg["port"], baudrate=cfg["baudrate"], eol=cfg["eol"],
                             timeout_s=cfg["timeout_s"], framing=cfg["framing"], label="detector")
        self.name = f"serial-ascii detector on {cfg['port']}"

    def identify(self) -> str:
        q = self.cfg["identify_query"]
        if not q:
            return f"meter on {self.cfg['port']}"
        ident = with_retries(lambda: self.link.query(q, echo=self.cfg["echo"]),
                             retries=self.cfg["retries"], backoff_s=self.cfg["backoff_s"],
                             recover=self.link.flush_input)
        return f"{ident} (on {self.cfg['port']})"

    def _read_once(self) -> Reading:
        q = self.cfg["query"]
        line = self.link.query(q, echo=self.cfg["echo"])
        m = self.value_rx.fullmatch(line)
        if not m:
            raise TransientDeviceError(f"{self.link.where()}: sent {q!r}, got {line!r}, "
                                       f"expected value_reply {self.value_rx.pattern!r}")
        return Reading(parse_value(m["value"], self.link.where(), q, line))

    def read(self) -> Reading:
        return with_retries(self._read_once, retries=self.cfg["retries"],
                            backoff_s=self.cfg["backoff_s"], recover=self.link.flush_input)

    def close(self) -> None:
        self.link.close()
