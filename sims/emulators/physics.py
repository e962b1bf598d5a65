"""One simulated bench shared by several emulator threads.

The stepper thread moves the bench while the meter thread reads it; a lock
keeps each call whole. ``bench_from_rig`` builds the project's simulated
bench (``sims.instruments.SimBench``) from a rig file's sections, or any
other physics given as ``module:factory`` (called with the sections).
"""
from __future__ import annotations

import importlib
import threading
import time
from typing import Any, Callable


class LockedPhysics:
    """Thread-safe view of a bench: move_to, position_steps, read_value, render_frame, truth.

    Motors register with ``add_mover``; before each reading they are brought
    up to the present moment, so a meter read mid-move sees the mount where a
    continuously turning motor would have put it, not where the controller's
    thread last looked.
    """

    def __init__(self, bench: Any):
        self.bench = bench
        self._lock = threading.Lock()
        self._movers: list[Callable[[float], None]] = []

    def add_mover(self, advance: Callable[[float], None]) -> None:
        self._movers.append(advance)

    def _catch_up(self) -> None:
        now = time.monotonic()
        for advance in self._movers:   # outside the lock: a mover calls move_to
            advance(now)

    def move_to(self, target_steps: int) -> None:
        with self._lock:
            self.bench.move_to(target_steps)

    def position_steps(self) -> int:
        with self._lock:
            return self.bench.position_steps()

    def read_value(self) -> float:
        self._catch_up()
        with self._lock:
            return float(self.bench.read_value())

    def render_frame(self):
        self._catch_up()
        with self._lock:
            return self.bench.render_frame()

    def truth(self) -> dict:
        with self._lock:
            return self.bench.truth()


def bench_from_rig(sections: dict, factory: str | None = None) -> LockedPhysics:
    if factory:
        module, _, name = factory.partition(":")
        make = getattr(importlib.import_module(module), name)
    else:
        from sims.instruments import SimBench as make
    return LockedPhysics(make(sections))


class CombPhysics:
    """A noise-free stand-in bench: a Lorentzian blip every ``spacing_steps``.

    For protocol tests that need exact numbers: ``value_at(steps)`` is the
    reading at any position, with no backlash, no noise and no clock.
    ``render_frame`` draws a round spot whose peak follows the value.
    """

    def __init__(self, spacing_steps: float = 40.0, fwhm_steps: float = 6.0, height: float = 1.0,
                 baseline: float = 0.1, phase_steps: float = 20.0):
        self.spacing, self.fwhm, self.height = spacing_steps, fwhm_steps, height
        self.baseline, self.phase = baseline, phase_steps
        self.steps = 0
        self.reads = 0
        self.path: list[int] = []            # every position the motor passed through

    def value_at(self, steps: float) -> float:
        d = (steps - self.phase) % self.spacing
        d = min(d, self.spacing - d)
        return self.baseline + self.height / (1.0 + (2.0 * d / self.fwhm) ** 2)

    def move_to(self, target_steps: int) -> None:
        self.steps = int(target_steps)
        self.path.append(self.steps)

    def position_steps(self) -> int:
        return self.steps

    def read_value(self) -> float:
        self.reads += 1
        return self.value_at(self.steps)

    def render_frame(self):
        import numpy as np

        yy, xx = np.mgrid[0:48, 0:64]
        spot = np.exp(-((xx - 32.0) ** 2 + (yy - 24.0) ** 2) / (2 * 4.0 ** 2))
        return np.clip(10 + 200 * self.value_at(self.steps) * spot, 0, 255).astype(np.uint8)

    def truth(self) -> dict:
        return {"spacing_steps": self.spacing}
