"""What every stage on a serial line shares: soft limits, retries, stop on any exit."""
from __future__ import annotations

import time

from drivers.base import DeviceError, LimitError
from drivers.retry import with_retries
from drivers.serial_link import PORT_GONE, LineLink


class LineStage:
    """Base of the serial-line stages; subclasses implement ``_move_once(target)``.

    ``move_to`` checks the soft limits before anything is sent, retries
    transient faults (the subclass makes each try safe to repeat) and sends
    the stop command on every way out of a failed move. ``stop`` and ``close``
    never raise and may be called any number of times.
    """

    SCAN_STALL_S = 2.0

    def __init__(self, cfg: dict, min_steps: int | None, max_steps: int | None):
        self.cfg = cfg
        self.min_steps, self.max_steps = min_steps, max_steps
        self._closed = False
        self.link = LineLink(cfg["port"], baudrate=cfg["baudrate"], eol=cfg["eol"],
                             timeout_s=cfg["timeout_s"], framing=cfg["framing"], label="stage")

    def _retry(self, action):
        return with_retries(action, retries=self.cfg["retries"], backoff_s=self.cfg["backoff_s"],
                            recover=self.link.flush_input)   # a late reply must not answer the next command

    def check_limits(self, target_steps: int) -> None:
        lo, hi = self.min_steps, self.max_steps
        if (lo is not None and target_steps < lo) or (hi is not None and target_steps > hi):
            raise LimitError(f"{self.link.where()}: target {target_steps} steps is outside the soft limits "
                             f"[{lo}, {hi}]; nothing was sent")

    def move_to(self, target_steps: int) -> None:
        target_steps = int(target_steps)
        self.check_limits(target_steps)
        try:
            self._retry(lambda: self._move_once(target_steps))
        except BaseException:
            self.stop()
            raise

    def _move_once(self, target_steps: int) -> None:
        raise NotImplementedError

    def _scan_progress(self, pos: int, target: int) -> bool:
        """For is_moving() from position reports: True while short of target; a
        position that stops changing for SCAN_STALL_S short of it is a fault."""
        now = time.monotonic()
        if pos == target:
            return False
        if pos != getattr(self, "_scan_last", None):
            self._scan_last, self._scan_t = pos, now
        elif now - self._scan_t > self.SCAN_STALL_S:
            self.stop()
            raise DeviceError(f"{self.link.where()}: scan stalled at {pos} steps, short of {target}")
        return True

    def _after_stop(self) -> None:
        """Read whatever the stop command answers (subclasses that expect a reply)."""

    def stop(self) -> None:
        """Best effort: never raises, safe to repeat, works after a fault."""
        if self._closed:
            return
        try:
            self.link.flush_input()
            self.link.send(self.cfg["stop_command"])
            self._after_stop()
        except (DeviceError, *PORT_GONE):
            pass

    def close(self) -> None:
        if self._closed:
            return
        self.stop()
        self._closed = True
        self.link.close()
