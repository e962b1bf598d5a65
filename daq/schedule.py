"""The sweep schedule: which positions to visit, in which direction, on which pass.

Pass 0 runs from ``start`` to ``stop``; each later pass runs back over the
same points in the opposite direction (``passes`` = 1 one way, 2 there and
back, N alternating). With ``overshoot_steps`` > 0 the stage travels that far
past each turning point without recording, then comes back, so every pass
starts with the backlash taken up in its own direction (common practice:
approach a point always from the same side).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Iterator


@dataclass(frozen=True, slots=True)
class Move:
    target_steps: int
    direction: int   # +1 or -1: the direction of travel this move belongs to
    pass_index: int
    record: bool     # False for overshoot moves, which take no reading


def pass_points(sweep: dict) -> list[int]:
    start, stop, step = sweep["start"], sweep["stop"], sweep["step"]
    d = 1 if stop > start else -1
    return list(range(start, stop + d, d * step))


def recorded_count(sweep: dict) -> int:
    """How many samples the whole schedule records."""
    return sum(1 for m in moves(sweep) if m.record)


def moves(sweep: dict, skip_recorded: int = 0) -> Iterator[Move]:
    """All moves of the schedule; the first ``skip_recorded`` recorded moves
    (and the overshoot moves among them) are left out, for resuming."""
    pts = pass_points(sweep)
    d0 = 1 if sweep["stop"] > sweep["start"] else -1
    over = sweep["overshoot_steps"]
    seen = 0
    for p in range(sweep["passes"]):
        d = d0 if p % 2 == 0 else -d0
        seq = pts if p % 2 == 0 else pts[::-1]
        if p > 0 and over == 0:
            seq = seq[1:]  # the turning point was read at the end of the last pass
        for target in seq:
            if seen >= skip_recorded:
                yield Move(target, d, p, True)
            seen += 1
        if over and p < sweep["passes"] - 1 and seen > skip_recorded:
            yield Move(seq[-1] + d * over, d, p, False)


DEFAULT_TAKEUP_STEPS = 50   # travel that takes up the play of a typical screw mount (common practice)


def takeup_steps(sweep: dict) -> int:
    """How far to back off before approaching a point, to take up backlash.

    The sweep's own overshoot when set, else twice the step, at least
    DEFAULT_TAKEUP_STEPS.
    """
    return max(sweep["overshoot_steps"], 2 * sweep["step"], DEFAULT_TAKEUP_STEPS)
