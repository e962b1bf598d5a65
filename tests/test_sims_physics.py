"""The simulator's physics against published relations and reference values.

Each check names its source beside it. Reference numbers are computed in the
test from the published formula, or marked "from memory".
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.signal import find_peaks

from daq.rig import load_rig
from sims import optics
from sims.dispersion import Sellmeier, single_oscillator
from sims.instruments import SimBench
from sims.model import SimModel
from sims.trace import simulate_trace

QUIET = ["sim.white_noise_v=0.0", "sim.pink_noise_v=0.0", "sim.adc_bits=24"]


def rig(*overrides):
    return load_rig(None, list(overrides))


# --- grating ------------------------------------------------------------------------

@pytest.mark.parametrize("lines_per_mm, wavelength_nm, order", [
    (1500.0, 936.2, 1), (1200.0, 780.0, 1), (1800.0, 780.0, 1), (600.0, 1064.0, 2), (2400.0, 405.0, 1)])
def test_littrow_angle_is_the_grating_equation_solved_for_alpha_equal_beta(lines_per_mm, wavelength_nm, order):
    # Palmer, Diffraction Grating Handbook: m lambda = d (sin alpha + sin beta); Littrow alpha = beta.
    d_nm = 1e6 / lines_per_mm
    expected = math.degrees(math.asin(order * wavelength_nm / (2 * d_nm)))
    theta = optics.littrow_angle_deg(wavelength_nm, lines_per_mm, order)
    assert theta == pytest.approx(expected, abs=1e-9)
    # The diffracted order returns along the incident beam (beta = alpha).
    assert optics.diffraction_angle_deg(theta, wavelength_nm, lines_per_mm, order) == pytest.approx(theta, abs=1e-9)
    assert optics.littrow_wavelength_nm(theta, lines_per_mm, order) == pytest.approx(wavelength_nm, rel=1e-12)


def test_littrow_angles_quoted_in_the_trade():
    # From memory: Rb-line (780 nm) ECDLs use 1800 l/mm at ~44.6 deg or 1200 l/mm at ~27.9 deg.
    assert optics.littrow_angle_deg(780.0, 1800.0) == pytest.approx(44.6, abs=0.05)
    assert optics.littrow_angle_deg(780.0, 1200.0) == pytest.approx(27.9, abs=0.05)
    with pytest.raises(ValueError):
        optics.littrow_angle_deg(1500.0, 1500.0)  # m lambda > 2d: no Littrow angle


def test_sim_feedback_wavelength_and_tuning_rate_follow_littrow():
    m = SimModel(rig().sections)
    d_nm = 1e6 / 1500.0  # configs/sim.toml grating
    for steps in (1000, 3000, 5000):
        theta = math.radians(44.0 + 2.0e-4 * steps)  # configs/sim.toml calibration, linear lever
        assert m.wavelength_nm(steps) == pytest.approx(2 * d_nm * math.sin(theta), rel=1e-12)
        # Palmer: dlambda/dtheta = 2 d cos(theta) / m, times the angle per step in radians.
        rate = 2 * d_nm * math.cos(theta) * math.radians(2.0e-4)
        assert m.tuning_nm_per_step(steps) == pytest.approx(rate, rel=1e-6)


def test_sine_bar_lever_rate_is_k_over_cos():
    # Sine bar (common practice in metrology): theta = asin(k (s - s_p)), dtheta/ds = k / sqrt(1 - u^2).
    m = SimModel(rig('sim.scenario="lever"').sections)
    k = math.radians(2.0e-4)
    s = 3000.0
    u = k * (s - (-40000))
    h = 0.5
    slope = (m.angle_deg(s + h) - m.angle_deg(s - h)) / (2 * h)
    assert math.radians(slope) == pytest.approx(k / math.sqrt(1 - u * u), rel=1e-7)
    assert m.angle_deg(0) == pytest.approx(44.0, abs=1e-12)  # calibrated zero kept


# --- dispersion -----------------------------------------------------------------------

# Malitson (1965), fused silica, lambda in um: n^2 - 1 = sum B_i lambda^2 / (lambda^2 - C_i^2).
MALITSON = ((0.6961663, 0.0684043), (0.4079426, 0.1162414), (0.8974794, 9.896161))


def malitson_n(lam_um: float) -> float:
    return math.sqrt(1 + sum(b * lam_um ** 2 / (lam_um ** 2 - c ** 2) for b, c in MALITSON))


def test_group_index_matches_numerical_derivative_of_a_published_sellmeier():
    silica = Sellmeier(1.0, tuple((b, c * c) for b, c in MALITSON))
    for lam_nm in (633.0, 800.0, 1064.0, 1550.0):
        lam = lam_nm * 1e-3
        h = 1e-5
        dn = (malitson_n(lam + h) - malitson_n(lam - h)) / (2 * h)
        # n_g = n - lambda dn/dlambda (Saleh & Teich; Coldren et al.)
        assert silica.group_index(lam_nm) == pytest.approx(malitson_n(lam) - lam * dn, abs=1e-8)
    # From memory: fused silica n = 1.4440, n_g = 1.4626 at 1550 nm; n = 1.4533, n_g = 1.4671 at 800 nm;
    # n_D = 1.4585 at 589 nm.
    assert silica.index(1550.0) == pytest.approx(1.4440, abs=2e-4)
    assert silica.group_index(1550.0) == pytest.approx(1.4626, abs=3e-4)
    assert silica.index(800.0) == pytest.approx(1.4533, abs=2e-4)
    assert silica.group_index(800.0) == pytest.approx(1.4671, abs=3e-4)
    assert silica.index(589.3) == pytest.approx(1.4585, abs=2e-4)


def test_chip_model_has_the_requested_n_and_n_g():
    chip = single_oscillator(3.41, 3.64, 936.0)
    assert chip.index(936.0) == pytest.approx(3.41, rel=1e-12)
    h = 1e-3
    dn = (chip.index(936.0 + h) - chip.index(936.0 - h)) / (2 * h)
    assert chip.index(936.0) - 936.0 * dn == pytest.approx(3.64, rel=1e-8)  # n - lambda dn/dlambda
    with pytest.raises(ValueError):
        single_oscillator(3.5, 3.4, 936.0)  # n_g < n: anomalous, the model refuses


def test_chip_index_is_plausible_for_a_gaas_waveguide():
    # From memory: GaAs near 940 nm has n ~ 3.5, AlGaAs cladding ~3.3-3.4, so an effective index in between;
    # III-V group indices near the band edge 3.4-4.5 (from memory).
    m = SimModel(rig().sections)
    lam = 936.0
    assert 3.3 < m.phase_index(lam) < 3.55
    assert 3.4 < m.group_index(lam) < 4.5


# --- modes -----------------------------------------------------------------------

def chip_mode_wavelengths(model: SimModel, lo_nm: float, hi_nm: float) -> list[float]:
    """Solve 2 n(lambda) L / lambda = q by root finding (round-trip phase = 2 pi q)."""
    f = lambda lam, q: 2 * model.phase_index(lam) * model.length_nm / lam - q
    q_hi, q_lo = f(lo_nm, 0), f(hi_nm, 0)
    return sorted(brentq(f, lo_nm, hi_nm, args=(q,), xtol=1e-12)
                  for q in range(math.ceil(q_lo), math.floor(q_hi) + 1))


def test_mode_spacing_follows_group_index_not_phase_index():
    m = SimModel(rig().sections)
    lams = chip_mode_wavelengths(m, 935.0, 937.5)
    spacings = np.diff(lams)
    mid = 0.5 * (np.array(lams[1:]) + np.array(lams[:-1]))
    L = m.length_nm
    # Saleh & Teich / Coldren: delta lambda = lambda^2 / (2 n_g L).
    for s, lam in zip(spacings, mid):
        assert s == pytest.approx(lam ** 2 / (2 * m.group_index(lam) * L), rel=2e-4)
    with_n = mid ** 2 / (2 * np.array([m.phase_index(x) for x in mid]) * L)
    assert np.mean(with_n / spacings) == pytest.approx(3.64 / 3.41, rel=2e-3)  # wrong by n_g/n


def test_blips_in_the_readings_sit_at_the_chip_modes():
    """Peaks of a noise-free simulated sweep, converted with the Littrow formula, are the chip modes."""
    r = rig(*QUIET)
    tr = simulate_trace(r.sections)
    up = tr.pass_index == 0
    x, v = tr.position_steps[up].astype(float), tr.value[up]
    peaks, _ = find_peaks(v, prominence=0.5)
    # Parabolic interpolation of each peak.
    a, b, c = v[peaks - 1], v[peaks], v[peaks + 1]
    xp = x[peaks] + 0.5 * (a - c) / (a - 2 * b + c)
    lam = 2 * (1e6 / 1500.0) * np.sin(np.radians(44.0 + 2.0e-4 * xp))
    m = SimModel(r.sections)
    modes = np.array(chip_mode_wavelengths(m, lam.min() - 0.05, lam.max() + 0.05))
    nearest = np.abs(lam[:, None] - modes[None, :]).min(axis=1)
    # Count vs span: N = W / delta lambda (common practice), span W from the grating equation.
    span = 2 * (1e6 / 1500.0) * (math.sin(math.radians(45.0)) - math.sin(math.radians(44.2)))
    centre = 2 * (1e6 / 1500.0) * math.sin(math.radians(44.6))
    fsr = centre ** 2 / (2 * m.group_index(centre) * m.length_nm)
    assert nearest.max() < 0.05 * fsr  # within 5 % of a mode spacing
    assert len(peaks) == len(modes)
    assert len(peaks) == pytest.approx(span / fsr, abs=1.0)


# --- Fabry-Perot -----------------------------------------------------------------

@pytest.mark.parametrize("R", [0.3, 0.62, 0.9, 0.99])
def test_airy_finesse_and_width(R):
    # Hecht: F = pi sqrt(R) / (1 - R); coefficient of finesse 4R/(1-R)^2; FWHM in phase from
    # 1 + coef sin^2(phi/2) = 2, i.e. phi_half = 2 asin(1/sqrt(coef)).
    F = math.pi * math.sqrt(R) / (1 - R)
    assert optics.finesse(R) == pytest.approx(F, rel=1e-12)
    coef = 4 * R / (1 - R) ** 2
    assert optics.finesse_coefficient(R) == pytest.approx(coef, rel=1e-12)
    mnum = np.linspace(-0.5, 0.5, 400001)  # one free spectral range, in mode-number units
    t = optics.airy(mnum, optics.finesse_coefficient(R), np)
    assert t.max() == pytest.approx(1.0)
    assert t.min() == pytest.approx(1 / (1 + coef), rel=1e-9)
    above = mnum[t >= 0.5]
    fwhm = above.max() - above.min()
    assert fwhm == pytest.approx(4 * math.asin(1 / math.sqrt(coef)) / (2 * math.pi), abs=1e-5)
    if R >= 0.9:
        assert 1 / fwhm == pytest.approx(F, rel=0.01)  # F = FSR / FWHM at high finesse


def test_blip_width_in_steps_is_fsr_over_finesse():
    r = rig(*QUIET)
    tr = simulate_trace(r.sections)
    up = tr.pass_index == 0
    x, v = tr.position_steps[up], tr.value[up]
    sel = (x > 2900) & (x < 3100)
    xs, vs = x[sel].astype(float), v[sel]
    peak = int(np.argmax(vs))
    floor = vs.min()
    half = floor + 0.5 * (vs[peak] - floor)
    # Linear interpolation of the half-maximum crossings on both flanks.
    i = peak
    while vs[i] > half:
        i -= 1
    left = xs[i] + (half - vs[i]) / (vs[i + 1] - vs[i])
    j = peak
    while vs[j] > half:
        j += 1
    right = xs[j - 1] + (vs[j - 1] - half) / (vs[j - 1] - vs[j])
    m = SimModel(r.sections)
    lam = m.wavelength_nm(3000)
    fsr_steps = lam ** 2 / (2 * m.group_index(lam) * m.length_nm) / m.tuning_nm_per_step(3000)
    R = 0.62  # [sim] lasing_reflectance near the gain peak (the gain there is ~1)
    coef = 4 * R / (1 - R) ** 2
    # Hecht's Airy function 1/(1 + coef sin^2(phi/2)); the width is measured at half height above
    # the floor (valley 1/(1+coef) plus a constant background), i.e. where T = (1 + 1/(1+coef)) / 2.
    t_half = 0.5 * (1 + 1 / (1 + coef))
    expected = fsr_steps * 2 * math.asin(math.sqrt((1 / t_half - 1) / coef)) / math.pi
    assert right - left == pytest.approx(expected, rel=0.02)


# --- temperature -----------------------------------------------------------------

def test_gain_and_modes_shift_with_temperature_at_different_rates():
    m = SimModel(rig().sections)
    lam0 = chip_mode_wavelengths(m, 936.0, 936.2)[0]
    q = round(m.mode_number(lam0))
    lam1 = brentq(lambda lam: m.mode_number(lam, 1.0) - q, lam0 - 0.1, lam0 + 0.2, xtol=1e-12)
    assert lam1 - lam0 == pytest.approx(0.07, rel=0.01)  # [sim] mode_shift_nm_per_K
    lams = np.linspace(900, 970, 70001)
    g0, _ = m.gain_shapes(lams, 0.0, np)
    g1, _ = m.gain_shapes(lams, 1.0, np)
    assert lams[g1.argmax()] - lams[g0.argmax()] == pytest.approx(0.28, abs=0.002)  # gain_shift_nm_per_K
