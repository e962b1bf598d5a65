"""A whole simulated sweep at once (numpy), with the same physics as the step-by-step bench.

``simulate_trace(sections)`` follows the rig's [sweep]: passes alternate up
and down over start..stop (both ends read in every pass), ``reads_per_step``
reads averaged per sample, overshoot travel between passes unread. The
stage starts at ``start`` with the play taken up in the first pass's
direction, which is also how ``SimBench`` powers up, so a bench driven
through the same schedule reads the same numbers.

Camera rigs render and reduce every frame (a few thousand frames per
second); meter rigs run at millions of samples per second.
"""
from __future__ import annotations

import math
from typing import Any, NamedTuple

import numpy as np

from sims.mechanics import schedule_mechanics
from sims.model import SimModel
from sims.signal_chain import STREAM_FRAME, NoiseSource, stream

CHUNK_SAMPLES = 1 << 20


class Trace(NamedTuple):
    position_steps: np.ndarray   # int64, commanded position of each sample
    direction: np.ndarray        # int8, +1 up / -1 down
    pass_index: np.ndarray       # int32, 0, 1, 2, ...
    value: np.ndarray            # float64, detector value (volts, or ROI counts for a camera)


def sweep_schedule(sweep: dict[str, Any], n_samples: int | None = None
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[int]]:
    """(position, direction, pass_index, index of each pass's first sample).

    The recorded samples of the engine's schedule (daq.schedule): pass 0 from
    start to stop, later passes back and forth over the same points; without
    overshoot a later pass does not read its turning point again (the last
    pass read it), with overshoot it does. ``n_samples`` None: the configured
    passes; otherwise passes keep alternating until exactly n_samples samples.
    """
    start, stop, step = sweep["start"], sweep["stop"], sweep["step"]
    sign = 1 if stop > start else -1
    pts = np.arange(start, stop + sign, sign * step, dtype=np.int64)
    skip = 0 if sweep.get("overshoot_steps", 0) > 0 else 1
    later = pts.size - skip
    if n_samples is None:
        passes = sweep.get("passes", 1)
        total = pts.size + (passes - 1) * later
    else:
        total = int(n_samples)
        passes = 1 + max(0, math.ceil((total - pts.size) / later)) if later > 0 else 1
    per_pass = [pts.size] + [later] * (passes - 1)
    starts = np.concatenate([[0], np.cumsum(per_pass)[:-1]]).astype(np.int64)
    size = int(sum(per_pass))
    pos = np.empty(size, dtype=np.int64)
    direction = np.empty(size, dtype=np.int8)
    pass_index = np.empty(size, dtype=np.int32)
    for p in range(passes):
        i0 = int(starts[p])
        up = p % 2 == 0
        seq = pts if up else pts[::-1]
        if p > 0:
            seq = seq[skip:]
        pos[i0:i0 + seq.size] = seq
        direction[i0:i0 + seq.size] = sign if up else -sign
        pass_index[i0:i0 + seq.size] = p
    keep = [int(i) for i in starts if i < total]
    return pos[:total], direction[:total], pass_index[:total], keep


def actual_positions(model: SimModel, pos: np.ndarray, direction: np.ndarray,
                     starts: list[int]) -> np.ndarray:
    p = model.params
    return schedule_mechanics(pos, direction, np.asarray(starts), p["backlash_steps"], model.kick_sites,
                              p["kick_recover_steps"], model.sweep.get("overshoot_steps", 0))


def sample_times_s(model: SimModel, n_samples: int) -> np.ndarray:
    """Simulated time of each sample (its last read), as SimBench's clock counts it."""
    r = model.reads_per_step
    return ((np.arange(n_samples, dtype=np.float64) + 1.0) * r - 1.0) * model.dt_read_s


def simulate_trace(sections: dict[str, dict[str, Any]], n_samples: int | None = None,
                   model: SimModel | None = None) -> Trace:
    """The rig's sweep schedule, simulated in one go. See the module docstring."""
    m = model or SimModel(sections)
    pos, direction, pass_index, starts = sweep_schedule(m.sweep, n_samples)
    x = actual_positions(m, pos, direction, starts)
    p = m.params
    noise = NoiseSource(m.seed, p["white_noise_v"], p["pink_noise_v"], p["spike_prob"],
                        p["spike_height_v"])
    r = m.reads_per_step
    value = np.empty(pos.size, dtype=np.float64)
    for i0 in range(0, pos.size, CHUNK_SAMPLES):
        i1 = min(i0 + CHUNK_SAMPLES, pos.size)
        xr = np.repeat(x[i0:i1], r) if r > 1 else x[i0:i1]
        t = np.arange(i0 * r, i1 * r, dtype=np.float64) * m.dt_read_s
        pink, meter = noise.take(xr.size)
        angle = m.lever.angle_deg(xr, np)
        lam = m.two_d_over_m * np.sin(angle * (math.pi / 180.0))
        dT = m.temp_offset_K(t, np)
        power = m.power_v(lam, dT, np) + m.offset_v(t, np) + pink
        if m.camera is None:
            reads = m.adc.convert_array(power + meter)
        else:
            cam, j0 = m.camera, i0 * r
            reads = np.array([cam.reduce(cam.render(float(power[k]), float(angle[k]),
                                                    stream(m.seed, STREAM_FRAME, j0 + k)
                                                    .standard_normal((cam.h, cam.w))))[0]
                              for k in range(xr.size)])
        value[i0:i1] = reads.reshape(-1, r).mean(axis=1) if r > 1 else reads
    return Trace(pos, direction, pass_index, value)
