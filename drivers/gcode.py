"""A grating actuator on one axis of a G-code controller (hobby/open firmware).

Words used, as defined in the NIST RS274NGC interpreter specification
(Kramer, Proctor & Messina, NISTIR 6556, version 3, 2000): G90 absolute and
G91 incremental distance mode, G0 rapid and G1 feed-rate linear motion, F
feed rate in units per minute, G4 dwell with P in seconds. Each line the host
sends is answered with ``ok`` (or an ``error...`` line) by the common open
firmwares; that handshake is the flow control. ``G4 P0`` answers only after
the moves before it have finished, which is how a move is known complete.

Position query and stop are not RS274NGC words; they differ between firmwares
and are set in the rig file (e.g. M114 / M410 on Marlin-like firmware).
Actuator steps map to axis units by ``units_per_step`` (mm or degrees per
step, as the firmware's axis is configured).
"""
from __future__ import annotations

import re
import time
from typing import Any

from drivers.base import DeviceError, TransientDeviceError
from drivers.line_stage import LineStage
from drivers.messages import raise_first
from drivers.retry import RETRY_KEYS
from drivers.serial_link import SERIAL_KEYS

# ... as a default means the key must be given (daq.rig.REQUIRED).
GCODE_KEYS: dict[str, Any] = {
    **SERIAL_KEYS,
    "port": (str, ...),
    "baudrate": 115200,
    "eol": "\n",
    "timeout_s": 2.0,
    "axis": "X",
    "units_per_step": (float, ...),   # axis units (mm or deg) per actuator step
    "feed_per_min": (float, ...),     # F word: axis units per minute
    "motion": "G1",                   # "G1" (at feed_per_min) or "G0" (rapid)
    "positioning": "absolute",        # "absolute" (G90) or "relative" (G91)
    "decimals": 4,                    # digits after the point in axis words
    "ok_reply": "ok",
    "init_commands": [],              # sent once at open, e.g. ["G21"] (mm units)
    "startup_wait_s": 0.0,            # boards that reset on port open print a banner first
    "sync_command": "G4 P0",          # answered only once motion has finished
    "query_position": "M114",
    "position_reply": (str, None),    # regex with group pos; default "<axis>:<number>"
    "stop_command": (str, ...),       # e.g. "M410" (Marlin quick stop) or "!" (Grbl feed hold)
    "home_command": (str, None),      # e.g. "G28 X"; only on explicit home()
    "move_timeout_s": 60.0,
    "position_tolerance_steps": 0,
    **RETRY_KEYS,
}

_REFUSAL = re.compile(r"(?i)^(error|alarm|!!)")


def check_gcode_settings(cfg: dict) -> list[tuple[str, str]]:
    out = []
    if not re.fullmatch(r"[ABCUVWXYZ]", cfg["axis"]):
        out.append(("axis", f"must be one axis letter (X, Y, Z, A, B, C, U, V, W), got {cfg['axis']!r}"))
    if cfg["units_per_step"] <= 0:
        out.append(("units_per_step", "must be positive"))
    if cfg["feed_per_min"] <= 0:
        out.append(("feed_per_min", "must be positive"))
    if cfg["motion"] not in ("G0", "G1"):
        out.append(("motion", f"must be \"G0\" or \"G1\", got {cfg['motion']!r}"))
    if cfg["positioning"] not in ("absolute", "relative"):
        out.append(("positioning", f"must be \"absolute\" or \"relative\", got {cfg['positioning']!r}"))
    if cfg["units_per_step"] > 0 and 10.0 ** -cfg["decimals"] > cfg["units_per_step"] / 2:
        out.append(("decimals", f"{cfg['decimals']} digits cannot resolve one step of {cfg['units_per_step']:g} units"))
    if cfg["position_reply"] is not None:
        try:
            rx = re.compile(cfg["position_reply"])
            if "pos" not in rx.groupindex:
                out.append(("position_reply", "needs a named group (?P<pos>...)"))
        except re.error as exc:
            out.append(("position_reply", f"not a valid regular expression ({exc})"))
    if not all(isinstance(c, str) for c in cfg["init_commands"]):
        out.append(("init_commands", "must be a list of strings"))
    return out


class GcodeStage(LineStage):
    """One axis of a G-code controller, addressed in actuator steps."""

    def __init__(self, cfg: dict, min_steps: int | None, max_steps: int | None):
        raise_first(check_gcode_settings(cfg), "stage")
        self.axis = cfg["axis"]
        pattern = cfg["position_reply"] or rf"{self.axis}:\s*(?P<pos>[-+]?\d+(?:\.\d*)?)"
        self.pos_rx = re.compile(pattern)
        self.name = f"gcode stage ({self.axis} axis) on {cfg['port']}"
        self._scan_target: int | None = None
        super().__init__(cfg, min_steps, max_steps)
        try:
            if cfg["startup_wait_s"]:
                time.sleep(cfg["startup_wait_s"])
            mode = "G90" if cfg["positioning"] == "absolute" else "G91"
            for line in [mode, *cfg["init_commands"]]:
                self._retry(lambda line=line: self._command(line))
        except BaseException:
            self.link.close()
            raise

    # -- protocol ---------------------------------------------------------------
    def _command(self, line: str, timeout_s: float | None = None) -> list[str]:
        """Send one line; return the lines that came before its ok."""
        self.link.flush_input()
        self.link.send(line)
        ok = self.cfg["ok_reply"]
        info: list[str] = []
        while True:
            reply = self.link.read_line(line, timeout_s)
            if reply == ok or reply.startswith(ok + " "):
                return info
            if _REFUSAL.match(reply):
                raise DeviceError(f"{self.link.where()}: sent {line!r}, controller refused it: {reply!r}")
            info.append(reply)
            if len(info) > 32:
                raise TransientDeviceError(f"{self.link.where()}: sent {line!r}, no {ok!r} among "
                                           f"{len(info)} reply lines (last {reply!r})")

    def _units(self, steps: int) -> str:
        return f"{steps * self.cfg['units_per_step']:.{self.cfg['decimals']}f}"

    def _position_once(self) -> int:
        q = self.cfg["query_position"]
        for reply in self._command(q):
            m = self.pos_rx.search(reply)
            if m:
                try:
                    return round(float(m["pos"]) / self.cfg["units_per_step"])
                except ValueError:
                    break
        raise TransientDeviceError(f"{self.link.where()}: sent {q!r}, no reply matching "
                                   f"{self.pos_rx.pattern!r} before {self.cfg['ok_reply']!r}")

    # -- Stage interface ----------------------------------------------------------
    def identify(self) -> str:
        return f"G-code controller on {self.cfg['port']}, {self.axis} axis at {self.position_steps()} steps"

    def position_steps(self) -> int:
        return self._retry(self._position_once)

    def _move_once(self, target: int) -> None:
        cfg = self.cfg
        if cfg["positioning"] == "absolute":
            word = self._units(target)
        else:
            # Incremental moves are not idempotent: take the delta from a fresh
            # position reading on every try, so a retry never moves twice.
            delta = target - self._position_once()
            if delta == 0:
                return
            word = self._units(delta)
        move = f"{cfg['motion']} {self.axis}{word} F{cfg['feed_per_min']:g}"
        self._command(move)
        self._command(cfg["sync_command"], timeout_s=cfg["move_timeout_s"])
        pos = self._position_once()
        if abs(pos - target) > cfg["position_tolerance_steps"]:
            raise TransientDeviceError(f"{self.link.where()}: sent {move!r}, axis at {pos} steps instead of {target}")

    # -- continuous scan ([sweep] mode = "scan") -----------------------------------------
    def start_scan(self, end_steps: int, speed_steps_per_s: float) -> None:
        """One G1 move to end_steps at the scan speed; returns once it is planned (ok)."""
        end_steps = int(end_steps)
        self.check_limits(end_steps)
        feed = speed_steps_per_s * self.cfg["units_per_step"] * 60.0
        self._scan_target = end_steps

        def once() -> None:
            steps = end_steps if self.cfg["positioning"] == "absolute" else end_steps - self._position_once()
            self._command(f"G1 {self.axis}{self._units(steps)} F{feed:g}")
        try:
            self._retry(once)
        except BaseException:
            self.stop()
            raise

    def is_moving(self) -> bool:
        return self._scan_progress(self.position_steps(), self._scan_target)

    def home(self) -> None:
        cmd = self.cfg["home_command"]
        if not cmd:
            raise DeviceError(f"{self.link.where()}: no home_command in the rig file")
        self._command(cmd, timeout_s=self.cfg["move_timeout_s"])
