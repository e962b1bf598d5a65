"""One simulated bench shared by several emulator threads.

The stepper thread moves the bench while the meter thread reads it; a lock
keeps each call whole. ``bench_from_rig`` builds the project's simulated
bench (``sims.instruments.SimBench``) from a rig file's sections, or any
other physics given as ``module:factory`` (called with the sections).
"""
from __future__ import annotations

import importlib
import threading
from typing import Any


class LockedPhysics:
    """Thread-safe view of a bench: move_to, position_steps, read_value, render_frame, truth."""

    def __init__(self, bench: Any):
        self.bench = bench
        self._lock = threading.Lock()

    def move_to(self, target_steps: int) -> None:
        with self._lock:
            self.bench.move_to(target_steps)

    def position_steps(self) -> int:
        with self._lock:
            return self.bench.position_steps()

    def read_value(self) -> float:
        with self._lock:
            return float(self.bench.read_value())

    def render_frame(self):
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
