"""Published relations the simulated laser is built from (scalar or numpy via ``xp``).

- Grating equation, order m, groove spacing d: m lambda = d (sin alpha + sin beta);
  in Littrow (alpha = beta = theta) m lambda = 2 d sin theta, and the tuning rate
  is dlambda/dtheta = 2 d cos theta / m. Source: Palmer, Diffraction Grating Handbook.
- Fabry-Perot: coefficient of finesse 4R/(1-R)^2 = (2F/pi)^2 with finesse
  F = pi sqrt(R) / (1 - R); Airy transmission 1 / (1 + (2F/pi)^2 sin^2(phi/2)),
  round-trip phase phi = 4 pi n L / lambda. Sources: Hecht, Optics; Saleh & Teich.
- Free spectral range of a resonator of length L: lambda^2 / (2 n_g L).
  Sources: Saleh & Teich; Coldren, Corzine & Mashanovitch.
"""
from __future__ import annotations

import math


def groove_spacing_nm(lines_per_mm: float) -> float:
    return 1e6 / lines_per_mm


def littrow_wavelength_nm(angle_deg, lines_per_mm: float, order: int = 1, xp=math):
    """Wavelength returned along the incident beam at grating angle theta."""
    return 2.0 * groove_spacing_nm(lines_per_mm) * xp.sin(angle_deg * (math.pi / 180.0)) / order


def littrow_angle_deg(wavelength_nm: float, lines_per_mm: float, order: int = 1) -> float:
    s = order * wavelength_nm / (2.0 * groove_spacing_nm(lines_per_mm))
    if not -1.0 <= s <= 1.0:
        raise ValueError(f"no Littrow angle: order {order} at {wavelength_nm} nm needs sin(theta) = {s:.3f}")
    return math.degrees(math.asin(s))


def diffraction_angle_deg(incidence_deg: float, wavelength_nm: float, lines_per_mm: float,
                          order: int = 1) -> float:
    """beta from the general grating equation m lambda = d (sin alpha + sin beta)."""
    s = order * wavelength_nm / groove_spacing_nm(lines_per_mm) - math.sin(math.radians(incidence_deg))
    return math.degrees(math.asin(s))


def littrow_tuning_nm_per_deg(angle_deg: float, lines_per_mm: float, order: int = 1) -> float:
    return 2.0 * groove_spacing_nm(lines_per_mm) * math.cos(math.radians(angle_deg)) / order * (math.pi / 180.0)


def finesse(reflectance: float) -> float:
    return math.pi * math.sqrt(reflectance) / (1.0 - reflectance)


def finesse_coefficient(reflectance):
    """(2F/pi)^2 = 4R/(1-R)^2."""
    return 4.0 * reflectance / ((1.0 - reflectance) * (1.0 - reflectance))


def airy(mode_number, coefficient, xp=math):
    """Airy transmission with phi = 2 pi * mode_number (peaks at integer mode numbers)."""
    s = xp.sin(math.pi * mode_number)
    return 1.0 / (1.0 + coefficient * s * s)


def mode_spacing_nm(wavelength_nm: float, group_index: float, length_um: float) -> float:
    return wavelength_nm * wavelength_nm / (2.0 * group_index * length_um * 1e3)
