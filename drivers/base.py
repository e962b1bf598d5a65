"""The two interfaces every instrument adapter implements, and their errors.

Units: stage positions are integer actuator steps; detector values are in the
instrument's own unit (volts, watts, counts, ROI sums) and are only compared
with each other, never converted.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol, runtime_checkable


class DeviceError(RuntimeError):
    """A device failed in a way retrying will not fix (or retries ran out).

    The message is one line naming the port or resource, what was sent and
    what came back, so it can be shown to the user as it is.
    """


class TransientDeviceError(DeviceError):
    """A fault worth retrying: a timeout, a garbled or partial reply."""


class LimitError(DeviceError):
    """A move was refused before anything was sent: target outside soft limits."""


@dataclass(slots=True)
class Reading:
    """One detector reading taken at a settled stage position.

    ``value`` is what the counter sees. ``spread`` is the standard deviation of
    the reads averaged into it (0 for a single read). ``aux`` holds auxiliary
    channels (e.g. ``{"temp_C": 24.1}``, a camera's centroid), logged beside
    the sample.
    """

    value: float
    spread: float = 0.0
    aux: dict[str, float] = field(default_factory=dict)


@runtime_checkable
class Stage(Protocol):
    """A motorised grating mount, addressed in actuator steps."""

    name: str

    def identify(self) -> str:
        """Return a one-line identity string; must not move anything."""

    def position_steps(self) -> int:
        """The controller's reported position in steps (commanded frame)."""

    def move_to(self, target_steps: int) -> None:
        """Move to an absolute position and return once the move is complete.

        Raises LimitError before sending anything if the target is outside the
        soft limits, TransientDeviceError / DeviceError on faults.
        """

    def stop(self) -> None:
        """Stop motion now. Must be safe to call at any time, repeatedly."""

    def close(self) -> None:
        """Release the port. Calls stop() first if motion may be under way."""


@runtime_checkable
class Detector(Protocol):
    """A photodetector behind a meter, or a camera reduced to one number."""

    name: str

    def identify(self) -> str:
        """Return a one-line identity string (e.g. the *IDN? reply)."""

    def read(self) -> Reading:
        """Take one reading (averaged over reads_per_step where configured)."""

    def close(self) -> None:
        """Release the instrument."""
