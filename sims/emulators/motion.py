"""Motor motion shared by the controller emulators: constant speed, limit switches.

The position walks linearly to the target; every whole step on the way is
passed to the physics (``physics.move_to(steps)``), so the simulated bench
sees the same sequence of positions a real actuator goes through.
"""
from __future__ import annotations

import threading


class Motion:
    def __init__(self, physics, start_steps: int | None = None, min_steps: int = -1_000_000,
                 max_steps: int = 1_000_000):
        """``start_steps`` None: the motor is where the physics is (no move at power-up)."""
        self.physics = physics
        if start_steps is None:
            start_steps = int(physics.position_steps())
        self.min_steps, self.max_steps = min_steps, max_steps
        self.position = float(start_steps)      # motor position in steps (commanded frame)
        self.target = start_steps
        self._from, self._t0, self._dur = self.position, 0.0, 0.0
        self._now = 0.0
        self._physics_at = start_steps
        self.moves = self.stops = self.stalls = 0
        # The controller thread and, through the physics, the meter threads advance
        # the motion; one lock keeps each update whole.
        self._lock = threading.RLock()
        add_mover = getattr(physics, "add_mover", None)
        if add_mover is not None:
            add_mover(self.tick)
        if physics.position_steps() != start_steps:
            physics.move_to(start_steps)

    def steps(self) -> int:
        return round(self.position)

    def busy(self) -> bool:
        return self.steps() != self.target

    def tick(self, now: float) -> None:
        with self._lock:
            self._tick(now)

    def _tick(self, now: float) -> None:
        # Threads pass their own clock readings; time only runs forward here.
        now = self._now = max(now, self._now)
        if not self.busy():
            return
        frac = 1.0 if self._dur <= 0 else min(1.0, (now - self._t0) / self._dur)
        self.position = self._from + (self.target - self._from) * frac
        if frac >= 1.0:
            self.position = float(self.target)
        self._walk_to(self.steps())

    def _walk_to(self, step: int) -> None:
        """Pass every whole step from the last one to ``step`` to the physics, as a motor does."""
        direction = 1 if step > self._physics_at else -1
        for s in range(self._physics_at + direction, step + direction, direction):
            try:
                self.physics.move_to(s)
            except Exception:   # the physics refuses (end stop, limit): the motor stalls there
                self.position = float(self._physics_at)
                self.target = self._physics_at
                self.stalls += 1
                return
            self._physics_at = s

    def start(self, target_steps: int, speed_steps_per_s: float, now: float) -> None:
        """Begin a move; a target past a limit switch stops at the switch."""
        with self._lock:
            self._tick(now)
            self._from, self._t0 = self.position, self._now
            self.target = max(self.min_steps, min(self.max_steps, int(target_steps)))
            self._dur = abs(self.target - self.position) / speed_steps_per_s
            self.moves += 1
            self._tick(now)

    def stop(self) -> None:
        with self._lock:
            self.target = self.steps()
            self.position = float(self.target)
            self._walk_to(self.target)
            self.stops += 1
