"""What a perfect counter would find in a simulated sweep: the simulator's truth.

Rule for ``modes``: chip mode q counts when
  1. the grating feedback crosses it from half height to half height during
     the rig's [sweep]: the mode number M along the simulated path (mechanics
     and drift included) runs at least half a blip FWHM past q on both sides,
     min M + 1/(2F) <= q <= max M - 1/(2F) (F the lasing finesse), and
  2. its blip is detectable: blip height (max - min of the noise-free
     detector value over one free spectral range around the mode, after
     clipping and quantization, or the camera's ROI sum) >= detect_k x the
     noise standard deviation of one sample (white, 1/f and quantization;
     spikes are outliers and do not count).
Mode centres are for the ideal mount moving up at the start temperature, in
steps; ``spacing_steps`` is the local spacing at the middle detectable mode
(what the analysis states: the spacing in steps changes along a sweep),
``spacing_steps_mean`` the least-squares slope of centre against mode index
(the mean over the sweep), ``spacing_nm`` is lambda^2/(2 n_g L) at the centre
of the swept range.
"""
from __future__ import annotations

import math

import numpy as np

from sims.model import SimModel
from sims.trace import actual_positions, sample_times_s, sweep_schedule

GRID_POINTS_PER_MODE = 129


def noise_sigma(model: SimModel) -> float:
    """Standard deviation of one averaged sample, in the detector's unit."""
    p, r = model.params, model.reads_per_step
    if model.camera is None:
        fast = p["white_noise_v"] ** 2 + model.adc.lsb_v ** 2 / 12.0
        return math.sqrt(fast / r + p["pink_noise_v"] ** 2)
    cam = model.camera
    return math.sqrt(cam.sum_noise_sigma() ** 2 / r + (p["pink_noise_v"] * cam.counts_per_v_in_sum()) ** 2)


def mode_centres_steps(model: SimModel, lo_steps: float, hi_steps: float) -> tuple[np.ndarray, np.ndarray]:
    """(mode orders q, ideal centre positions) of the chip modes between lo and hi steps."""
    xs = np.arange(lo_steps, hi_steps + 0.25, 0.25)
    lam = model.wavelength_nm(xs, np)
    mnum = model.mode_number(lam, 0.0, np)
    if mnum[0] < mnum[-1]:  # keep M falling along xs for np.interp on the reversed arrays
        raise ValueError("mode number must fall with grating angle (order > 0 and angle rising)")
    orders = np.arange(math.ceil(mnum[-1]), math.floor(mnum[0]) + 1)
    centres = np.interp(orders, mnum[::-1], xs[::-1])
    return orders, centres


def blip_heights(model: SimModel, centres: np.ndarray, fsr_steps: float) -> np.ndarray:
    """Noise-free blip height (detector units) of each mode centred at ``centres``."""
    offsets = np.linspace(-0.5, 0.5, GRID_POINTS_PER_MODE) * fsr_steps
    grid = centres[:, None] + offsets[None, :]
    lam = model.wavelength_nm(grid, np)
    power = model.power_v(lam, 0.0, np)
    if model.camera is None:
        seen = model.adc.convert_array(power)
        return seen.max(axis=1) - seen.min(axis=1)
    cam, angle = model.camera, model.angle_deg(grid, np)
    rows = np.arange(centres.size)
    top, low = power.argmax(axis=1), power.argmin(axis=1)
    out = np.empty(centres.size)
    for i in rows:
        hi = cam.reduce(cam.render(float(power[i, top[i]]), float(angle[i, top[i]]), None))[0]
        lo = cam.reduce(cam.render(float(power[i, low[i]]), float(angle[i, low[i]]), None))[0]
        out[i] = hi - lo
    return out


def compute_truth(model: SimModel) -> dict:
    sweep, p = model.sweep, model.params
    pos, direction, _, starts = sweep_schedule(sweep)
    x = actual_positions(model, pos, direction, starts)
    t = sample_times_s(model, pos.size)
    lam_path = model.wavelength_nm(x, np)
    m_path = model.mode_number(lam_path, model.temp_offset_K(t, np), np)

    centre_x = model.sweep_centre_steps()
    lam_c = model.wavelength_nm(centre_x)
    tuning = model.tuning_nm_per_step(centre_x)
    spacing_nm = model.mode_spacing_nm(lam_c)
    fsr_steps_c = spacing_nm / abs(tuning)
    fin = model.lasing_finesse(lam_c)
    margin = 0.5 / fin  # half an FWHM in mode-number units (FWHM = FSR / F)

    lo, hi = float(x.min()), float(x.max())
    orders, centres = mode_centres_steps(model, lo - 2 * fsr_steps_c, hi + 2 * fsr_steps_c)
    crossed = (orders >= m_path.min() + margin) & (orders <= m_path.max() - margin)
    sigma = noise_sigma(model)
    heights = blip_heights(model, centres, fsr_steps_c)
    detectable = crossed & (heights >= p["detect_k"] * sigma)
    idx = np.argsort(centres[detectable])
    found = centres[detectable][idx]
    found_q = orders[detectable][idx]
    spacing_mean = float(abs(np.polyfit(np.arange(found.size), found, 1)[0])) if found.size >= 2 else fsr_steps_c
    if found.size >= 3:
        # the local spacing at the middle of the detectable modes (a central difference of
        # the true centres): the spacing in steps changes along a sweep, and this is the
        # place a fit of centre against mode number states it for
        # (per mode number: a missed order between the two counts as its own step)
        m = found.size // 2
        lo, hi = (m - 1, m + 1) if found.size % 2 else (m - 1, m)
        spacing_steps = float(abs(found[hi] - found[lo]) / abs(found_q[hi] - found_q[lo]))
    else:
        spacing_steps = spacing_mean
    return {
        "scenario": p["scenario"],
        "seed": p["seed"],
        "modes": int(detectable.sum()),
        "modes_crossed": int(crossed.sum()),
        "spacing_steps": spacing_steps,
        "spacing_steps_mean": spacing_mean,
        "spacing_steps_at_centre": fsr_steps_c,
        "spacing_nm": spacing_nm,
        "length_um": p["chip_length_um"],
        "group_index": float(model.group_index(lam_c)),
        "phase_index": float(model.phase_index(lam_c)),
        "wavelength_nm": float(lam_c),
        "tuning_nm_per_step": float(tuning),
        "blip_fwhm_steps": fsr_steps_c / fin,
        "noise_sigma": sigma,
        "min_blip_height": float(heights[detectable].min()) if detectable.any() else 0.0,
        "detect_rule": f"crossed half height to half height, blip height >= {p['detect_k']:g} x noise sigma "
                       f"({p['detect_k'] * sigma:.4g})",
        "mode_orders": [int(q) for q in found_q],
        "mode_centres_steps": [round(float(c), 3) for c in found],
    }
