"""Refractive index models: phase index n(lambda) and group index n_g = n - lambda dn/dlambda.

A Sellmeier formula n^2 = A + sum_i B_i lambda^2 / (lambda^2 - C_i) has an
analytic derivative, so the group index needs no numerical differencing:
d(n^2)/dlambda = -2 lambda sum_i B_i C_i / (lambda^2 - C_i)^2, hence
n_g = n - (lambda / 2n) d(n^2)/dlambda = n + (lambda^2 / n) sum_i B_i C_i / (lambda^2 - C_i)^2.
(Group index relation: Saleh & Teich, Fundamentals of Photonics, ch. on pulse
propagation; Coldren, Corzine & Mashanovitch, Diode Lasers and PICs.)

Wavelengths are in um inside a Sellmeier formula (that is how they are
published); the public functions take nm.
"""
from __future__ import annotations

import math
from dataclasses import dataclass


@dataclass(frozen=True)
class Sellmeier:
    """n^2 = a + sum(b * lam^2 / (lam^2 - c)) with lam in um, c in um^2."""

    a: float
    terms: tuple[tuple[float, float], ...]

    def index(self, wavelength_nm, xp=math):
        lam2 = (wavelength_nm * 1e-3) ** 2
        n2 = self.a
        for b, c in self.terms:
            n2 = n2 + b * lam2 / (lam2 - c)
        return xp.sqrt(n2)

    def group_index(self, wavelength_nm, xp=math):
        lam2 = (wavelength_nm * 1e-3) ** 2
        n = self.index(wavelength_nm, xp)
        acc = 0.0
        for b, c in self.terms:
            acc = acc + b * c / (lam2 - c) ** 2
        return n + lam2 * acc / n


def single_oscillator(phase_index: float, group_index: float, wavelength_nm: float) -> Sellmeier:
    """The one-term Sellmeier (a = 1) that has the given n and n_g at wavelength_nm.

    An effective-index model for a chip waveguide: with x = lam0^2/lam^2 and
    P = n^2 - 1 = B/(1 - x), the group-index formula above gives
    n_g - n = P x / (n (1 - x)), so x/(1 - x) = n (n_g - n) / P. Needs
    n > 1 and n_g > n (normal dispersion below the band gap).
    """
    n, ng = phase_index, group_index
    if not (n > 1.0 and ng > n):
        raise ValueError(f"need phase_index > 1 and group_index > phase_index (got n={n}, n_g={ng})")
    p = n * n - 1.0
    y = n * (ng - n) / p
    x = y / (1.0 + y)
    lam2 = (wavelength_nm * 1e-3) ** 2
    return Sellmeier(1.0, ((p * (1.0 - x), x * lam2),))
