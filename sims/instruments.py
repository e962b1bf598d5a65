"""Simulated instruments behind the ``drivers.base`` interfaces, sharing one physics model.

``SimBench(sections)`` holds the mount, the laser and the detector of one
simulated rig. Its clock is simulated: each read advances it by
``max(settle_s, read_time_s)`` and nothing here ever sleeps (the sweep engine
sleeps ``settle_s`` itself), so the same rig and seed give the same readings
however fast the engine runs.

Noise is drawn in chunks from per-quantity streams indexed by the read number
(``sims.signal_chain``), which is what keeps this step-by-step path and
``sims.trace.simulate_trace`` in agreement.
"""
from __future__ import annotations

import math
import time
from typing import Any

import numpy as np

from drivers.base import DeviceError, LimitError, Reading
from sims.mechanics import Mount
from sims.model import SimModel
from sims.signal_chain import STREAM_CAMERA, STREAM_FRAME, NoiseSource, stream

CHUNK_READS = 8192


class SimBench:
    """A simulated grating mount, laser and detector. See the module docstring."""

    def __init__(self, sections: dict[str, dict[str, Any]]):
        self.sections = sections
        try:
            self.model = m = SimModel(sections)
        except ValueError as exc:  # a rig the simulator cannot build: say so in one line
            raise DeviceError(f"sim bench: {exc}") from None
        p = m.params
        stage = sections["stage"]
        self.min_steps, self.max_steps = stage.get("min_steps"), stage.get("max_steps")
        self.travel = (p["travel_min_steps"], p["travel_max_steps"])
        sweep = sections["sweep"]
        first_dir = 1 if sweep["stop"] > sweep["start"] else -1
        # Power-up state: at the sweep start, play taken up in the first pass's direction.
        self.mount = Mount(p["backlash_steps"], m.kick_sites, p["kick_recover_steps"],
                           sweep["start"], first_dir)
        self.noise = NoiseSource(m.seed, p["white_noise_v"], p["pink_noise_v"], p["spike_prob"],
                                 p["spike_height_v"])
        self.reads = 0
        self.saturated_reads = 0   # reads at the ADC's top code or with a saturated ROI pixel
        self.frames = 0
        self._chunk_end = 0
        self._pink: list[float] = []
        self._meter: list[float] = []
        self.dt_s = m.dt_read_s
        self.last_centroid = (math.nan, math.nan)
        self.stage = SimStage(self)
        self.detector = SimDetector(self)
        self._truth: dict | None = None
        self._frame_camera = None
        self._scan: tuple | None = None   # (t0_s, start, target, speed) while scanning

    # -- mechanics ----------------------------------------------------------------
    def position_steps(self) -> int:
        if self._scan is not None:
            self._advance_scan()
        return self.mount.s

    def start_scan(self, target_steps: int, speed_steps_per_s: float) -> None:
        """Begin a constant-speed move to target; returns at once.

        A scan runs on the wall clock (time.monotonic), since the engine
        places each reading by the clock too: the one place the simulator is
        not paced by its own read counter.
        """
        target = int(target_steps)
        self.move_to(self.mount.s)          # limits check of the start
        if (self.min_steps is not None and target < self.min_steps) or \
                (self.max_steps is not None and target > self.max_steps):
            raise LimitError(f"sim stage: scan to {target} refused, outside soft limits "
                             f"[{self.min_steps}, {self.max_steps}]")
        self._scan = (time.monotonic(), self.mount.s, target, float(speed_steps_per_s))

    def is_moving(self) -> bool:
        if self._scan is not None:
            self._advance_scan()
        return self._scan is not None

    def _advance_scan(self) -> None:
        t0, p0, target, speed = self._scan
        d = 1 if target >= p0 else -1
        pos = p0 + d * speed * (time.monotonic() - t0)
        if (pos - target) * d >= 0:
            pos, self._scan = target, None
        self.mount.move(int(round(pos)))

    def move_to(self, target_steps: int) -> None:
        target = int(target_steps)
        if (self.min_steps is not None and target < self.min_steps) or \
                (self.max_steps is not None and target > self.max_steps):
            raise LimitError(f"sim stage: move to {target} refused, outside soft limits "
                             f"[{self.min_steps}, {self.max_steps}]")
        lo, hi = self.travel
        if target < lo or target > hi:
            self.mount.move(min(max(target, lo), hi))
            raise DeviceError(f"sim stage: move to {target} stalled at the end stop "
                              f"({self.mount.s} steps); set [stage] min_steps/max_steps")
        self.mount.move(target)

    # -- signal -------------------------------------------------------------------
    def _refill(self) -> None:
        pink, meter = self.noise.take(CHUNK_READS)
        self._pink, self._meter = pink.tolist(), meter.tolist()
        self._chunk_end += CHUNK_READS

    def time_s(self) -> float:
        """Simulated time of the next read."""
        return self.reads * self.dt_s

    def _source_power(self) -> tuple[float, float]:
        """(optical power incl. 1/f noise, angle) for the next read; does not advance."""
        m = self.model
        if self.reads >= self._chunk_end:
            self._refill()
        k = self.reads - (self._chunk_end - CHUNK_READS)
        t = self.reads * self.dt_s
        if self._scan is not None:
            self._advance_scan()
        x = self.mount.actual()
        angle = m.lever.angle_deg(x)
        lam = m.two_d_over_m * math.sin(angle * (math.pi / 180.0))
        dT = m.temp_offset_K(t) if m.drifts else 0.0
        return m.power_v(lam, dT) + m.offset_v(t) + self._pink[k], angle

    def read_value(self) -> float:
        """One reading at the current mechanical state; advances the simulated clock."""
        power, angle = self._source_power()
        m = self.model
        if m.camera is None:
            k = self.reads - (self._chunk_end - CHUNK_READS)
            value = m.adc.convert(power + self._meter[k])
            if value >= m.adc.top_v:
                self.saturated_reads += 1
        else:
            frame = m.camera.render(power, angle, stream(m.seed, STREAM_FRAME, self.reads)
                                    .standard_normal((m.camera.h, m.camera.w)))
            value, cx, cy = m.camera.reduce(frame)
            self.last_centroid = (cx, cy)
            if m.camera.saturated(frame):
                self.saturated_reads += 1
        self.reads += 1
        return value

    def temperature_offset_K(self) -> float:
        """Chip temperature change at the last read (the start of the run if none yet)."""
        return self.model.temp_offset_K(max(self.reads - 1, 0) * self.dt_s)

    def render_frame(self) -> np.ndarray:
        """A uint8 (H, W) camera frame at the current state (its own noise stream; clock unchanged)."""
        m = self.model
        if self._frame_camera is None:  # a meter rig can still show what a camera would see
            self._frame_camera = m.camera or m.make_camera()
        cam = self._frame_camera
        power, angle = self._source_power()
        noise = stream(m.seed, STREAM_CAMERA, self.frames).standard_normal((cam.h, cam.w))
        self.frames += 1
        return cam.render(power, angle, noise)

    def capture_frame(self) -> np.ndarray:
        """A camera frame taken as a reading: like render_frame, but the simulated
        clock moves on one read, so 1/f noise and drift change from frame to frame."""
        frame = self.render_frame()
        self.reads += 1
        return frame

    def truth(self) -> dict:
        """What a counter should find in the rig's [sweep] (see sims.truth)."""
        if self._truth is None:
            from sims.truth import compute_truth
            self._truth = compute_truth(self.model)
        return self._truth


class SimStage:
    """drivers.base.Stage for the simulated mount."""

    name = "sim-stage"

    def __init__(self, bench: SimBench):
        self._bench = bench
        self.move_to = bench.move_to
        self.position_steps = bench.position_steps
        self.start_scan = bench.start_scan
        self.is_moving = bench.is_moving

    def identify(self) -> str:
        p = self._bench.model.params
        return f"modetick simulated stage (scenario {p['scenario']}, seed {p['seed']})"

    def stop(self) -> None:
        """Step moves complete inside move_to; a scan is halted where it is."""
        if self._bench._scan is not None:
            self._bench._advance_scan()
            self._bench._scan = None

    def close(self) -> None:
        self.stop()


class SimDetector:
    """drivers.base.Detector for the simulated meter (or camera reduced to an ROI sum)."""

    name = "sim-detector"

    def __init__(self, bench: SimBench):
        self._bench = bench
        self._n = bench.model.reads_per_step
        self._aux = bench.model.drifts or bench.model.camera is not None

    def identify(self) -> str:
        p = self._bench.model.params
        kind = "camera" if p["detector"] == "camera" else f"{p['adc_bits']}-bit meter"
        return f"modetick simulated {kind} (scenario {p['scenario']}, seed {p['seed']})"

    def read(self) -> Reading:
        """Average of reads_per_step reads; aux "saturated" = 1 when any of them clipped."""
        bench = self._bench
        clipped = bench.saturated_reads
        if self._n == 1:
            value, spread = bench.read_value(), 0.0
        else:
            vals = [bench.read_value() for _ in range(self._n)]
            value = math.fsum(vals) / self._n
            spread = math.sqrt(sum((v - value) ** 2 for v in vals) / (self._n - 1))
        clipped = bench.saturated_reads != clipped
        if not (self._aux or clipped):
            return Reading(value, spread)
        aux = {"saturated": 1.0} if clipped else {}
        if bench.model.drifts:
            aux["temp_offset_K"] = bench.temperature_offset_K()
        if bench.model.camera is not None:
            aux["centroid_x_px"], aux["centroid_y_px"] = bench.last_centroid
        return Reading(value, spread, aux)

    def close(self) -> None:
        pass
