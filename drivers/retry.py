"""Bounded retries with exponential backoff for transient device faults.

Only ``TransientDeviceError`` is retried (a timeout, a garbled or partial
reply); anything else propagates at once. When the tries run out the last
transient message becomes a ``DeviceError`` saying how many tries were made.
"""
from __future__ import annotations

import time
from typing import Callable, TypeVar

from drivers.base import DeviceError, TransientDeviceError

T = TypeVar("T")

# Keys every driver with retries reads (merged into its rig-file schema).
RETRY_KEYS = {
    "retries": 3,          # extra tries after a transient fault (0 = fail at once)
    "backoff_s": 0.05,     # wait before the first retry; doubles on each further one
}


def with_retries(action: Callable[[], T], *, retries: int, backoff_s: float,
                 recover: Callable[[], str | None] | None = None) -> T:
    """Run ``action``; on a transient fault wait, call ``recover`` and try again.

    ``recover`` (e.g. drain stale input, read the instrument's error queue) may
    return a short note that is appended to the final error message.
    """
    note = None
    for attempt in range(retries + 1):
        try:
            return action()
        except TransientDeviceError as exc:
            last = exc
            if attempt == retries:
                break
            time.sleep(backoff_s * (2 ** attempt))
            if recover is not None:
                note = recover() or note
    tail = f"; {note}" if note else ""
    tries = f"{retries + 1} tries" if retries else "1 try"
    raise DeviceError(f"{last} (gave up after {tries}{tail})") from None
