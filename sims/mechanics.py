"""The grating mount: actuator steps to grating angle, backlash, stick-slip kicks.

Positions: ``s`` is the commanded screw position (what the controller
reports), ``x`` the position the grating actually sits at, both in steps.

- Backlash: a dead band of ``b`` steps. Moving up the screw pushes the mount
  (x = s); after a reversal the mount waits until the play is taken up, so
  moving down x = s + b. In general x stays inside [s, s + b]: moving up
  x = max(x, s), moving down x = min(x, s + b). (Calibrations are made moving
  up, so that direction has no offset; common practice.)
- Kicks: stick-slip at rough spots of the screw (sites at half-integer steps,
  fixed by the seed). Crossing a site the mount slips back against the motion
  by that site's slip, then catches up linearly over ``kick_recover_steps`` of
  further travel; a reversal ends the slip (the play absorbs it). A blip just
  before a site is therefore crossed twice.
- Lever geometry: linear (angle = a0 + k s), a sine bar (the actuator pushes
  a lever perpendicular at s_p: angle = a0 + asin(k (s - s_p)) - asin(-k s_p))
  or a tangent bar (atan instead of asin); k = deg_per_step in radians, so all
  three agree near s_p. Sine and tangent bars: common practice in metrology.
"""
from __future__ import annotations

import bisect
import math

import numpy as np


class KickSites:
    """Rough spots of the screw: sorted positions (half-integer steps) and slip sizes."""

    def __init__(self, rng: np.random.Generator, per_kstep: float, slip_steps: float,
                 lo_steps: int, hi_steps: int):
        span = hi_steps - lo_steps
        count = int(rng.poisson(per_kstep * span / 1000.0)) if per_kstep > 0 else 0
        pos = np.sort(rng.integers(lo_steps, hi_steps, size=count)) + 0.5
        pos = np.unique(pos)
        self.positions = pos
        self.slips = slip_steps * (0.55 + 0.8 * rng.random(pos.size))  # 10-25 steps at 18
        self.positions_list = pos.tolist()
        self.slips_list = self.slips.tolist()


class Lever:
    """Steps -> grating angle in degrees, for scalars (math) or arrays (numpy)."""

    def __init__(self, kind: str, deg_per_step: float, angle_at_zero_deg: float,
                 perpendicular_steps: int):
        self.kind = kind
        self.deg_per_step = deg_per_step
        self.a0 = angle_at_zero_deg
        self.k = math.radians(deg_per_step)
        self.sp = perpendicular_steps
        if kind == "sine":
            self.ref = math.asin(-self.k * self.sp)
        elif kind == "tangent":
            self.ref = math.atan(-self.k * self.sp)

    def angle_deg(self, x, xp=math):
        if self.kind == "linear":
            return self.a0 + self.deg_per_step * x
        f = xp.asin if self.kind == "sine" else xp.atan
        return self.a0 + (f(self.k * (x - self.sp)) - self.ref) * (180.0 / math.pi)

    def check_reach(self, lo_steps: float, hi_steps: float) -> None:
        if self.kind == "sine":
            worst = max(abs(self.k * (lo_steps - self.sp)), abs(self.k * (hi_steps - self.sp)))
            if worst >= 1.0:
                raise ValueError("[sim] lever_arm = \"sine\" cannot reach the travel "
                                 "(|deg_per_step in rad * (steps - lever_perpendicular_steps)| >= 1)")


class Mount:
    """Mechanical state for the step-by-step path (pure Python, a few us per move)."""

    def __init__(self, backlash_steps: float, sites: KickSites, recover_steps: float,
                 s_steps: int, direction: int):
        self.b = backlash_steps
        self.sites = sites.positions_list
        self.slips = sites.slips_list
        self.recover = recover_steps
        self.s = s_steps
        self.direction = direction
        self.x = s_steps + (backlash_steps if direction < 0 else 0.0)
        self.deficit = 0.0
        self.rate = 0.0

    def move(self, t: int) -> None:
        s = self.s
        if t == s:
            return
        d = 1 if t > s else -1
        if d != self.direction:
            self.direction = d
            self.deficit = 0.0
        if d > 0:
            if t > self.x:
                self.x = float(t)
        else:
            if t + self.b < self.x:
                self.x = t + self.b
        sites = self.sites
        if sites:
            if d > 0:  # sites with s < c <= t; the last crossed is the one below t
                j = bisect.bisect_right(sites, t) - 1
                hit = j >= 0 and sites[j] > s
            else:      # sites with t <= c < s; the last crossed is the one above t
                j = bisect.bisect_left(sites, t)
                hit = j < len(sites) and sites[j] < s
            if hit:
                slip = self.slips[j]
                self.rate = slip / self.recover
                self.deficit = max(0.0, slip - abs(t - sites[j]) * self.rate)
            elif self.deficit > 0.0:
                self.deficit = max(0.0, self.deficit - abs(t - s) * self.rate)
        self.s = t

    def actual(self) -> float:
        return self.x - self.direction * self.deficit


def schedule_mechanics(pos: np.ndarray, direction: np.ndarray, pass_start: np.ndarray,
                       backlash_steps: float, sites: KickSites, recover_steps: float,
                       overshoot_steps: int) -> np.ndarray:
    """Actual mount positions for a sweep schedule, the same rules as ``Mount``.

    ``pass_start`` holds the index of each pass's first sample. The stage is
    taken to sit at the first sample engaged in pass 0's direction with no
    slip under way; between passes it travels ``overshoot_steps`` past the end
    point (unread) before turning back, as the sweep engine does. Every
    sample after the first is a move (the schedule never reads a point twice
    in a row).
    """
    n = pos.size
    x = np.empty(n, dtype=np.float64)
    b = backlash_steps
    bounds = list(pass_start) + [n]
    d0 = int(direction[0]) if n else 1
    x_in = float(pos[0]) + (b if d0 < 0 else 0.0) if n else 0.0
    prev_s = float(pos[0]) if n else 0.0
    for p in range(len(bounds) - 1):
        i0, i1 = bounds[p], bounds[p + 1]
        if i0 >= i1:
            continue
        s = pos[i0:i1].astype(np.float64)
        d = int(direction[i0])
        if p > 0:
            end, d_prev = float(pos[i0 - 1]), int(direction[i0 - 1])
            if overshoot_steps > 0:
                tip = end + d_prev * overshoot_steps
                x_in = max(x_in, tip) if d_prev > 0 else min(x_in, tip + b)
                prev_s = tip
            else:
                prev_s = end
        x_bl = np.maximum(x_in, s) if d > 0 else np.minimum(x_in, s + b)
        x_in = float(x_bl[-1])
        deficit = _run_deficit(s, d, prev_s, sites, recover_steps)
        x[i0:i1] = x_bl - d * deficit
    return x


def _run_deficit(s: np.ndarray, d: int, origin: float, sites: KickSites,
                 recover_steps: float) -> np.ndarray:
    """Slip still to be recovered at each sample of a one-way run that began at origin."""
    c = sites.positions
    if c.size == 0:
        return np.zeros_like(s)
    if d > 0:
        j = np.searchsorted(c, s, side="right") - 1
        jc = np.clip(j, 0, c.size - 1)
        hit = (j >= 0) & (c[jc] > origin)
    else:
        j = np.searchsorted(c, s, side="left")
        jc = np.clip(j, 0, c.size - 1)
        hit = (j < c.size) & (c[jc] < origin)
    slip = sites.slips[jc]
    rate = slip / recover_steps
    left = np.maximum(0.0, slip - np.abs(s - c[jc]) * rate)
    return np.where(hit, left, 0.0)
