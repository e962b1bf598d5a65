"""Noise and the meter: per-read random streams, 1/f noise, spikes, the ADC.

Every random quantity comes from its own stream, seeded from ([sim] seed,
stream number), and is indexed by the read number alone, so the step-by-step
bench (which draws in chunks) and the whole-sweep trace (which draws at once)
see identical numbers, whatever the wall clock does.

1/f noise: a sum of first-order (AR(1)) processes with corner frequencies one
per decade and equal variances, the usual way to synthesise a 1/f spectrum
over a finite band (each Lorentzian covers about a decade; common practice).
"""
from __future__ import annotations

import math

import numpy as np
from scipy.signal import lfilter

# Stream numbers: one per random quantity (never reuse one for two purposes).
STREAM_WHITE = 1
STREAM_SPIKE_AT = 2
STREAM_SPIKE_SIZE = 3
STREAM_KICKS = 4
STREAM_PHASES = 5
STREAM_CAMERA = 6
STREAM_FRAME = 7
STREAM_PINK = 100  # + pole number

# Pink-noise poles, in cycles per read: 1e-6 .. 1e-1.
PINK_CORNERS_PER_READ = tuple(10.0 ** -k for k in range(6, 0, -1))


def stream(seed: int, number: int, *extra: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(number, *extra))))


class NoiseSource:
    """Noise for consecutive reads: ``take(n)`` -> (source 1/f volts, meter volts)."""

    def __init__(self, seed: int, white_v: float, pink_v: float, spike_prob: float,
                 spike_height_v: float):
        self.white_v, self.pink_v = white_v, pink_v
        self.spike_prob, self.spike_height_v = spike_prob, spike_height_v
        self.white = stream(seed, STREAM_WHITE)
        self.spike_at = stream(seed, STREAM_SPIKE_AT)
        self.spike_size = stream(seed, STREAM_SPIKE_SIZE)
        self.poles = []
        if pink_v > 0:
            sigma = pink_v / math.sqrt(len(PINK_CORNERS_PER_READ))
            for k, f in enumerate(PINK_CORNERS_PER_READ):
                rng = stream(seed, STREAM_PINK + k)
                a = math.exp(-2.0 * math.pi * f)
                gain = sigma * math.sqrt(1.0 - a * a)
                y0 = sigma * float(rng.standard_normal())  # start in the stationary state
                self.poles.append([rng, a, gain, np.array([a * y0])])

    def take(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        pink = np.zeros(n)
        for pole in self.poles:
            rng, a, gain, zi = pole
            y, pole[3] = lfilter([gain], [1.0, -a], rng.standard_normal(n), zi=zi)
            pink += y
        meter = np.zeros(n)
        if self.white_v > 0:
            meter += self.white_v * self.white.standard_normal(n)
        if self.spike_prob > 0:
            hit = self.spike_at.random(n) < self.spike_prob
            u = self.spike_size.uniform(-1.0, 1.0, n)  # sign and size, 0.5..1.5 x height
            meter += np.where(hit, np.sign(u) * (0.5 + np.abs(u)) * self.spike_height_v, 0.0)
        return pink, meter


class Adc:
    """Unipolar ADC: 0 .. full scale in 2**bits codes, round to nearest, clip at both ends."""

    def __init__(self, bits: int, full_scale_v: float):
        self.codes = (1 << bits) - 1
        self.lsb_v = full_scale_v / self.codes
        self.top_v = self.codes * self.lsb_v  # the top code's value (full scale, as rounded)

    def convert(self, v: float) -> float:
        code = math.floor(v / self.lsb_v + 0.5)
        if code < 0:
            code = 0
        elif code > self.codes:
            code = self.codes
        return code * self.lsb_v

    def convert_array(self, v: np.ndarray) -> np.ndarray:
        return np.clip(np.floor(v / self.lsb_v + 0.5), 0, self.codes) * self.lsb_v
